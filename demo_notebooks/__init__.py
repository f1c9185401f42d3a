"""Demo notebooks shipped with jostle; `jostle demo` copies them into a working folder."""
