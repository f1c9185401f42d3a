"""The command line: `jostle demo`, `present`, `fit`, `inspect`, `sweep`."""
