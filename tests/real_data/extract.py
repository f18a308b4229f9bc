#!/usr/bin/env python3
"""Turns the fetched contact matrix and population into a demefix job document.

Usage:
  python3 tests/real_data/extract.py DEST [job options]   # the job document, on stdout
  python3 tests/real_data/extract.py DEST --raw           # the raw numbers, on stdout

DEST is the folder fetch.py filled. The job (api.md) has one deme per age group of the
contact matrix (0-4, 5-9, ..., 70-74, 75+) and sends the matrix exactly as the package stores
it (float32 values widened to binary64, which is exact) with orientation `recruitment`: row i
is the age group of the person reporting contacts, column j the age group of the contacts
(Prem et al. 2017, PLoS Comput. Biol. 13:e1005697, define the matrix that way; from memory),
so a vacancy in age group i is filled from group j in proportion to i's contacts with j. The
service divides each row by its sum and says so in a warning.

Deme sizes: the population by age group of the same location and year from the same package
(UN WPP 2024, both sexes, ages 75 and over folded into the 75+ group), scaled to the total
size given by --total-size and rounded by largest remainder. The real total (about 67
million) is far beyond what an exact chain or a test's ensemble can run, so only the
proportions are kept; the default total, 200, is the smallest round total for which every
deme exchanges at least 5 migrants per generation (the strong-migration approximation's
`min_migrants` threshold), so that approximation can cross-check the ensembles.

--raw prints, without any conversion, what tests/real_matrix.rs recomputes independently:
the contact matrix and the chosen year's population rows as little-endian float32 bytes in
hex, with their shapes and age lower bounds.
"""

import argparse
import json
import sys
from pathlib import Path

sys.dont_write_bytecode = True  # no __pycache__ in the source tree
sys.path.insert(0, str(Path(__file__).resolve().parent))
import source  # noqa: E402  (the pins, beside this file)


class ExtractError(Exception):
    """The data does not have the shape this script expects; the message says how."""


def open_readers(dest: Path):
    readers = source.readers_dir(dest)
    if not readers.is_dir():
        raise ExtractError(f"{readers} is missing: run tests/real_data/fetch.py {dest} first")
    sys.path.insert(0, str(readers))
    import h5py  # noqa: E402  (installed by fetch.py)
    import numpy  # noqa: E402

    return h5py, numpy


def read_raw(dest: Path):
    """(contacts float32 16x16, contact age bounds, population float32 sexes x ages, its ages)."""
    h5py, numpy = open_readers(dest)
    with h5py.File(source.member_path(dest, source.CONTACTS_MEMBER), "r") as store:
        contact_ages = json.loads(store.attrs["spec"])["ages"]
        contacts = numpy.asarray(store[source.LOCATION][source.CONTACT_SETTING][()])
    with h5py.File(source.member_path(dest, source.POPULATION_MEMBER), "r") as store:
        group = store["population"]
        spec = json.loads(group.attrs["spec"])
        years = spec["years"]
        if source.POPULATION_YEAR not in years:
            raise ExtractError(f"population has years {years}, not {source.POPULATION_YEAR}")
        table = numpy.asarray(group[source.LOCATION][()])
        population = table[years.index(source.POPULATION_YEAR)]
        population_ages = spec["ages"]
    m = len(contact_ages)
    if contacts.dtype != numpy.float32 or contacts.shape != (m, m):
        raise ExtractError(f"contacts are {contacts.dtype} {contacts.shape}, not float32 {m}x{m}")
    if population.dtype != numpy.float32 or population.shape[-1] != len(population_ages):
        raise ExtractError(f"population row is {population.dtype} {population.shape}")
    if population_ages[:m] != contact_ages:
        raise ExtractError(
            f"population ages {population_ages} do not start with contact ages {contact_ages}"
        )
    return contacts, contact_ages, population, population_ages


def deme_id(lower: int, upper) -> str:
    return f"age_{lower:02d}_plus" if upper is None else f"age_{lower:02d}_{upper - 1:02d}"


def scaled_sizes(counts: list, total: int) -> list:
    """Largest-remainder rounding of `total * counts / sum(counts)`, ties to the lower index."""
    whole = sum(counts)
    exact = [total * c / whole for c in counts]
    sizes = [int(x) for x in exact]
    by_remainder = sorted(range(len(counts)), key=lambda i: (-(exact[i] - sizes[i]), i))
    for i in by_remainder[: total - sum(sizes)]:
        sizes[i] += 1
    if min(sizes) < 1:
        raise ExtractError(f"total size {total} leaves an empty age group: {sizes}")
    return sizes


def job(dest: Path, options) -> dict:
    contacts, ages, population, population_ages = read_raw(dest)
    m = len(ages)
    by_age = [float(v) for v in population.astype("float64").sum(axis=0)]
    counts = by_age[: m - 1] + [sum(by_age[m - 1 :])]
    sizes = scaled_sizes(counts, options.total_size)
    bounds = ages[1:] + [None]
    ids = [deme_id(lo, hi) for lo, hi in zip(ages, bounds)]
    starts = ["uniform"] + (ids if options.every_deme else [])
    return {
        "label": (
            f"{source.LOCATION.replace('_', ' ')}, {m} age groups: contacts Prem et al. 2021 "
            f"({source.CONTACT_SETTING} settings), population UN WPP 2024 "
            f"({source.POPULATION_YEAR}) scaled to {options.total_size}; "
            f"from {source.PACKAGE} {source.VERSION}"
        ),
        "population": {"demes": [{"id": i, "size": n} for i, n in zip(ids, sizes)]},
        "migration": {
            "orientation": "recruitment",
            # float() of a float32 is its exact binary64 value; json writes the shortest
            # decimal that reads back as that binary64.
            "matrix": [[float(v) for v in row] for row in contacts],
        },
        "dynamics": {"rule": options.rule},
        "selection": {"s": options.s},
        "start": starts,
        "method": {
            "kind": "ensemble",
            "seed": options.seed,
            "replicates": options.replicates,
            "chunk_size": options.chunk_size,
        },
        "outputs": {"times": True},
    }


def raw(dest: Path) -> dict:
    contacts, ages, population, population_ages = read_raw(dest)
    return {
        "contact_ages": ages,
        "contacts_shape": list(contacts.shape),
        "contacts_f32le": contacts.astype("<f4").tobytes().hex(),
        "population_year": source.POPULATION_YEAR,
        "population_ages": population_ages,
        "population_shape": list(population.shape),
        "population_f32le": population.astype("<f4").tobytes().hex(),
    }


def main(argv: list) -> int:
    parser = argparse.ArgumentParser(description=__doc__.strip().splitlines()[0])
    parser.add_argument("dest", type=Path, help="the folder fetch.py filled")
    parser.add_argument("--raw", action="store_true", help="print the raw numbers instead")
    parser.add_argument("--total-size", type=int, default=200)
    parser.add_argument(
        "--rule", default="death_birth", choices=["death_birth", "birth_death", "wright_fisher"]
    )
    parser.add_argument("--s", type=float, nargs="+", default=[0.0, 0.03])
    parser.add_argument("--every-deme", action="store_true", help="start in every age group too")
    parser.add_argument("--replicates", type=int, default=10000)
    parser.add_argument("--chunk-size", type=int, default=1000)
    parser.add_argument("--seed", type=int, default=20210701)
    options = parser.parse_args(argv[1:])
    try:
        document = raw(options.dest) if options.raw else job(options.dest, options)
    except (ExtractError, OSError, KeyError) as error:
        print(f"extract.py: {error}", file=sys.stderr)
        return 1
    json.dump(document, sys.stdout)
    sys.stdout.write("\n")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
