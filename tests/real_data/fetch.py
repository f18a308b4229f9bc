#!/usr/bin/env python3
"""Fetches the pinned real-data package into a folder outside the source tree.

Usage: python3 tests/real_data/fetch.py DEST

Downloads the wheel named in source.py with pip (no dependencies), checks its SHA-256,
unpacks only the two HDF5 data files and the licence texts (the package's code is never
unpacked, imported or run), and installs the pinned HDF5 readers (h5py, numpy; binary wheels
only) into DEST/<package>-<version>/readers. Writes complete.json last; a second call with the
same pins does nothing. Used by .ci/run and, when the data is missing, by tests/real_matrix.rs.
Exit status 0 on success, 1 with a message on stderr otherwise. Standard library only.
"""

import hashlib
import json
import os
import shutil
import subprocess
import sys
import tempfile
import zipfile
from pathlib import Path

sys.dont_write_bytecode = True  # no __pycache__ in the source tree
sys.path.insert(0, str(Path(__file__).resolve().parent))
import source  # noqa: E402  (the pins, beside this file)


class FetchError(Exception):
    """A step of the fetch failed; the message says which and why."""


def pip(*args: str) -> None:
    """Runs `python3 -m pip ARGS`, raising FetchError with pip's output on failure."""
    command = [sys.executable, "-m", "pip", "--disable-pip-version-check", *args]
    done = subprocess.run(command, capture_output=True, text=True)
    if done.returncode != 0:
        raise FetchError(
            f"`{' '.join(command)}` failed (exit {done.returncode}):\n{done.stdout}{done.stderr}"
        )


def sha256_of(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def already_fetched(dest: Path) -> bool:
    try:
        return json.loads(source.marker(dest).read_text()) == source.marker_content()
    except (OSError, ValueError):
        return False


def fetch_into(staging: Path, downloads: Path) -> None:
    """Fills `staging` (laid out like install_dir) from the registry."""
    pip(
        "download",
        "--no-deps",
        "--only-binary=:all:",
        "--dest",
        str(downloads),
        f"{source.PACKAGE}=={source.VERSION}",
    )
    wheel = downloads / source.WHEEL
    if not wheel.is_file():
        raise FetchError(f"pip did not produce {source.WHEEL} in {downloads}")
    found = sha256_of(wheel)
    if found != source.WHEEL_SHA256:
        raise FetchError(
            f"{source.WHEEL} has SHA-256 {found}, pinned {source.WHEEL_SHA256}: "
            "the registry served a different file"
        )
    members = (source.CONTACTS_MEMBER, source.POPULATION_MEMBER, *source.LICENCE_MEMBERS)
    with zipfile.ZipFile(wheel) as archive:
        for member in members:
            archive.extract(member, staging / "wheel")
    pip(
        "install",
        "--no-deps",
        "--only-binary=:all:",
        "--no-compile",
        "--target",
        str(staging / "readers"),
        *source.READERS,
    )
    (staging / "complete.json").write_text(json.dumps(source.marker_content(), indent=1) + "\n")


def fetch(dest: Path) -> None:
    if already_fetched(dest):
        print(f"{source.PACKAGE} {source.VERSION}: already in {source.install_dir(dest)}")
        return
    final = source.install_dir(dest)
    dest.mkdir(parents=True, exist_ok=True)
    # Build beside the final folder and rename it into place, so an interrupted or concurrent
    # fetch never leaves a half-filled folder that looks complete.
    with tempfile.TemporaryDirectory(dir=dest, prefix=".fetch-") as work:
        staging = Path(work) / "staging"
        staging.mkdir()
        fetch_into(staging, Path(work) / "downloads")
        if final.exists():
            shutil.rmtree(final)
        os.replace(staging, final)
    print(f"{source.PACKAGE} {source.VERSION}: fetched into {final}")


def main(argv: list) -> int:
    if len(argv) != 2:
        print(__doc__.strip().splitlines()[2], file=sys.stderr)
        return 1
    try:
        fetch(Path(argv[1]).resolve())
    except (FetchError, OSError, zipfile.BadZipFile, KeyError) as error:
        print(f"fetch.py: {error}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
