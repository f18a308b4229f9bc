#!/usr/bin/env python3
"""Installs the pinned schemathesis into a venv outside the source tree.

Usage: python3 tests/openapi/install.py DEST [--check]

Creates a venv in DEST/schemathesis-<version>-<pins> and installs requirements.txt (beside this
file) into it with pip, every wheel checked against its pinned SHA-256 (--require-hashes),
binary wheels only, no other package. Prints the venv's python on stdout. Writes complete.json
last; a second call with the same pins does nothing. With --check, installs nothing: prints the
venv's python if it is installed with these pins, else fails. Used by .ci/run (to install) and
by tests/openapi_conformance.rs (--check under CI, where .ci/run must have installed it;
otherwise to install it when missing).
Exit status 0 on success, 1 with a message on stderr otherwise. Standard library only.
"""

import hashlib
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

sys.dont_write_bytecode = True  # no __pycache__ in the source tree

REQUIREMENTS = Path(__file__).resolve().parent / "requirements.txt"


class InstallError(Exception):
    """A step of the install failed; the message says which and why."""


def pins() -> tuple[str, str]:
    """(schemathesis version, SHA-256 of requirements.txt)."""
    text = REQUIREMENTS.read_bytes()
    found = re.search(rb"^schemathesis==(\S+)", text, re.MULTILINE)
    if not found:
        raise InstallError(f"{REQUIREMENTS} pins no schemathesis version")
    return found.group(1).decode(), hashlib.sha256(text).hexdigest()


def install_dir(dest: Path) -> Path:
    version, digest = pins()
    return dest / f"schemathesis-{version}-{digest[:12]}"


def venv_python(folder: Path) -> Path:
    return folder / "venv" / "bin" / "python"


def marker_content() -> dict:
    version, digest = pins()
    return {
        "schemathesis": version,
        "requirements_sha256": digest,
        "python": sys.version.split()[0],
    }


def already_installed(folder: Path) -> bool:
    try:
        marker = json.loads((folder / "complete.json").read_text())
    except (OSError, ValueError):
        return False
    return marker == marker_content() and venv_python(folder).exists()


def run(command: list) -> None:
    done = subprocess.run(command, capture_output=True, text=True)
    if done.returncode != 0:
        raise InstallError(
            f"`{' '.join(map(str, command))}` failed (exit {done.returncode}):\n"
            f"{done.stdout}{done.stderr}"
        )


def install_into(staging: Path) -> None:
    """Fills `staging` (laid out like install_dir) from the registry."""
    run([sys.executable, "-m", "venv", str(staging / "venv")])
    run(
        [
            str(venv_python(staging)),
            "-m",
            "pip",
            "--disable-pip-version-check",
            "--no-input",
            "install",
            "--require-hashes",
            "--only-binary=:all:",
            "--no-deps",
            "-r",
            str(REQUIREMENTS),
        ]
    )
    # The venv's python is a symlink to this interpreter and finds its packages relative to
    # itself, so it keeps working after the rename below (its console scripts would not;
    # the test runs `python -m schemathesis.cli`).
    (staging / "complete.json").write_text(json.dumps(marker_content(), indent=1) + "\n")


def install(dest: Path, check_only: bool) -> Path:
    final = install_dir(dest)
    if already_installed(final):
        return venv_python(final)
    if check_only:
        raise InstallError(
            f"schemathesis is not installed in {final} with the pins of {REQUIREMENTS} "
            f"(run `python3 {Path(__file__).resolve()} {dest}`)"
        )
    dest.mkdir(parents=True, exist_ok=True)
    # Build beside the final folder and rename it into place, so an interrupted or concurrent
    # install never leaves a half-filled folder that looks complete.
    with tempfile.TemporaryDirectory(dir=dest, prefix=".install-") as work:
        staging = Path(work) / "staging"
        staging.mkdir()
        install_into(staging)
        if final.exists():
            shutil.rmtree(final)
        os.replace(staging, final)
    return venv_python(final)


def main(argv: list) -> int:
    if len(argv) not in (2, 3) or (len(argv) == 3 and argv[2] != "--check"):
        print(__doc__.strip().splitlines()[2], file=sys.stderr)
        return 1
    try:
        python = install(Path(argv[1]).resolve(), check_only=len(argv) == 3)
    except (InstallError, OSError) as error:
        print(f"install.py: {error}", file=sys.stderr)
        return 1
    print(python)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
