"""Both install modes expose `jostle`, `jostle.widgets` and the front-end files.

setuptools' package-dir maps kernel_side/ -> jostle, widgets/ -> jostle.widgets and
js/ -> jostle.js; this checks an editable install and a built wheel import alike.
"""
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

PROBE = (
    "import jostle, jostle.widgets, pathlib; "
    "print(pathlib.Path(jostle.__file__).resolve()); "
    "print(jostle.widgets.asset_path('theme.css')); "
    "from importlib import resources; print(resources.files('jostle.demo_notebooks'))"
)


def _probe(cwd: Path, env_path: str | None = None) -> list[str]:
    env = {"PATH": "/usr/bin:/bin", "HOME": str(cwd)}
    if env_path:
        env["PYTHONPATH"] = env_path
    done = subprocess.run([sys.executable, "-c", PROBE], cwd=cwd, env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    return done.stdout.strip().splitlines()


def test_editable_install_maps_the_folders(tmp_path):
    package, css, notebooks = _probe(tmp_path)
    assert Path(package) == ROOT / "kernel_side" / "__init__.py"
    assert Path(css) == ROOT / "js" / "theme.css"
    assert Path(notebooks) == ROOT / "demo_notebooks"


@pytest.mark.install
@pytest.mark.slow
def test_wheel_installs_and_finds_its_files(tmp_path):
    wheel_dir = tmp_path / "wheel"
    built = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q",
         "-w", str(wheel_dir), str(ROOT)],
        capture_output=True, text=True, timeout=300,
    )
    assert built.returncode == 0, built.stderr
    # a newcomer's build is quiet: no setuptools deprecation or package-data warnings
    assert "Warning" not in built.stderr, built.stderr
    (wheel,) = wheel_dir.glob("jostle-*.whl")
    names = set(zipfile.ZipFile(wheel).namelist())
    demo = ("01_first_tour", "02_fading_gradient", "03_meter_cards", "04_robustness_vs_accuracy", "05_bring_your_own",
            "06_limit_study", "07_scanned_cards_cnn")
    for expected in ("jostle/__init__.py", "jostle/posterior/ensemble.py", "jostle/attacks/problem.py",
                     "jostle/widgets/__init__.py", "jostle/js/theme.css", "jostle/data/leak_alarm_hmc.safetensors",
                     "jostle/data/leak_alarm_map.safetensors", "jostle/demo_notebooks/data/leak_alarm_limit.sqlite",
                     "jostle/js/limit_chart.js", *(f"jostle/demo_notebooks/{n}.ipynb" for n in demo)):
        assert expected in names, f"{expected} missing from the wheel"
    target = tmp_path / "site"
    installed = subprocess.run(
        [sys.executable, "-m", "pip", "install", "--no-deps", "-q", "--target", str(target), str(wheel)],
        capture_output=True, text=True, timeout=300,
    )
    assert installed.returncode == 0, installed.stderr
    # PYTHONPATH comes before the editable finder, so the wheel's copy is the one imported.
    package, css, notebooks = _probe(tmp_path, env_path=str(target))
    assert Path(package) == (target / "jostle" / "__init__.py").resolve()
    assert Path(css) == (target / "jostle" / "js" / "theme.css").resolve()
    assert Path(notebooks) == (target / "jostle" / "demo_notebooks").resolve()
