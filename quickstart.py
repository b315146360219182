#!/usr/bin/env python3
"""Set up towerflow in a local virtual environment and run the demo or the tests.

    python3 quickstart.py demo     # creates .venv, installs towerflow, runs the invented demo network
    python3 quickstart.py test     # creates .venv, installs towerflow with its test extras, runs pytest

Needs only Python 3.11+ and access to the package index. Extra arguments after the
command are passed on (to ``towerflow demo`` or to ``pytest``).
"""
from __future__ import annotations

import os
import subprocess
import sys
import venv
from pathlib import Path

HERE = Path(__file__).resolve().parent
VENV = HERE / ".venv"


def _python() -> Path:
    return VENV / ("Scripts/python.exe" if os.name == "nt" else "bin/python")


def _setup(extras: str) -> None:
    if sys.version_info < (3, 11):
        sys.exit(f"towerflow needs Python 3.11 or newer; this is {sys.version.split()[0]}")
    if not _python().exists():
        print(f"creating virtual environment in {VENV}", flush=True)
        venv.EnvBuilder(with_pip=True).create(VENV)
    target = f".[{extras}]" if extras else "."
    print(f"installing towerflow{('[' + extras + ']') if extras else ''} (first time: a few minutes)", flush=True)
    subprocess.run([str(_python()), "-m", "pip", "install", "--quiet", "--disable-pip-version-check",
                    "-e", target], cwd=HERE, check=True)


def main(argv: list[str]) -> int:
    if not argv or argv[0] not in ("demo", "test"):
        print(__doc__)
        return 2
    command, rest = argv[0], argv[1:]
    if command == "demo":
        _setup("dask")
        return subprocess.run([str(_python()), "-m", "towerflow", "demo", *rest], cwd=HERE).returncode
    _setup("test")
    return subprocess.run([str(_python()), "-m", "pytest", *rest], cwd=HERE).returncode


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
