"""The pinned source of the real contact matrix that tests/real_matrix.rs runs: one place.

Provenance (recorded here, in the test's doc comment and in README.md beside this file):

* carrier: the PyPI package ``starsim-data`` 2.0.0 (wheel pinned by SHA-256 below), used only
  as a carrier of data files: its code is never imported or run; fetch.py unpacks two HDF5
  files and the licence texts out of the wheel;
* contacts: ``starsim_data/data/prem2021.h5``, dataset ``/United_Kingdom/all``: the 16 x 16
  all-settings contact matrix of Prem K, van Zandvoort K, Klepac P, Eggo RM, Davies NG,
  CMMID COVID-19 Working Group, Cook AR, Jit M (2021) "Projecting contact matrices in 177
  geographical regions: an update and comparison with empirical data for the COVID-19 era",
  PLoS Comput. Biol. 17(7):e1009098 (mean daily contacts of a person in age group i with
  people in age group j, 5-year groups 0-4 ... 70-74 and 75+; projected from contact surveys
  and demography); data licence GPL-3.0 (the package ships the text);
* population: ``starsim_data/data/demographics-2024.h5``, dataset ``/population/United_Kingdom``:
  United Nations, Department of Economic and Social Affairs, Population Division (2024), World
  Population Prospects 2024, persons by 5-year age group and sex; licence CC BY 3.0 IGO;
* package code and curation: MIT; the data keep their own licences (the package's NOTICE.md).

The readers are general-purpose libraries (h5py and numpy) installed next to the data, never
into the interpreter's own site-packages.
"""

from pathlib import Path

PACKAGE = "starsim-data"
VERSION = "2.0.0"
WHEEL = "starsim_data-2.0.0-py3-none-any.whl"
WHEEL_SHA256 = "57a28daa9fdb52409b81c139fc8bfec94ed6a417883f66b886df554b327e6748"

# Members of the wheel that are unpacked (data and licence texts; no code).
CONTACTS_MEMBER = "starsim_data/data/prem2021.h5"
POPULATION_MEMBER = "starsim_data/data/demographics-2024.h5"
LICENCE_MEMBERS = (
    "starsim_data-2.0.0.dist-info/licenses/LICENSE",
    "starsim_data-2.0.0.dist-info/licenses/NOTICE.md",
    "starsim_data-2.0.0.dist-info/licenses/licenses/LICENSE_PREM2021",
)

# HDF5 readers, pinned (binary wheels only).
READERS = ("h5py==3.16.0", "numpy==2.4.6")

# What the test reads.
LOCATION = "United_Kingdom"
CONTACT_SETTING = "all"
POPULATION_YEAR = 2020


def install_dir(dest: Path) -> Path:
    """Where fetch.py puts everything, under the caller's data folder."""
    return Path(dest) / f"{PACKAGE}-{VERSION}"


def member_path(dest: Path, member: str) -> Path:
    """Where an unpacked wheel member lives."""
    return install_dir(dest) / "wheel" / member


def readers_dir(dest: Path) -> Path:
    """The folder holding h5py and numpy (put on sys.path by extract.py)."""
    return install_dir(dest) / "readers"


def marker(dest: Path) -> Path:
    """Written last by fetch.py: its presence means the fetch completed."""
    return install_dir(dest) / "complete.json"


def marker_content() -> dict:
    """What the marker records, so a changed pin refetches."""
    return {
        "package": PACKAGE,
        "version": VERSION,
        "wheel_sha256": WHEEL_SHA256,
        "readers": list(READERS),
    }
