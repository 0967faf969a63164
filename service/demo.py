"""The demo scenario: the specimen registry of the (invented) Saltmarsh Point Field Station.

Everything is generated from a fixed seed with the standard library's :mod:`random`, so every
machine builds the same ~1,500 specimens and the README's example request answers the same
everywhere. The people, places and species are made up from syllable lists; any resemblance to
a real name is a coincidence of the syllables.

The data is correlated the way a real registry is: each collector works a handful of sites,
each site covers a depth band, and each genus lives in a depth band of its own, so cues built
from one or two fields are often ambiguous while three fields usually single out a specimen.

Examples
--------
>>> records = demo_records(n=40)
>>> key, fields = records[0]
>>> key
'SMP-2019-00001'
>>> sorted(fields)
['collected_on', 'collector', 'depth_m', 'site_code', 'taxon']
>>> demo_records(n=40) == records
True
"""

from __future__ import annotations

import datetime
import random
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any, Final

from service.recall.models import CollectionSpec, ImportReport
from service.recall.service import DEFAULT_TEAM, RecallService

__all__ = [
    "DEMO_COLLECTION",
    "DEMO_SEED",
    "DemoRecord",
    "demo_records",
    "demo_schema",
    "describe_fragment",
    "example_fragment",
    "load_demo",
    "smudge",
    "typo",
]

DEMO_COLLECTION: Final = "specimens"
DEMO_SEED: Final = 20_240_917
DEMO_SIZE: Final = 1500
#: Seed of the collection's codec; fixed so the demo's compiled memory (and its checksum) is
#: the same on every machine.
DEMO_CODEC_SEED: Final = 7_302_019

FieldValue = str | float | None
DemoRecord = tuple[str, dict[str, FieldValue]]

_FIRST_DATE: Final = datetime.date(2019, 1, 1)
_LAST_DATE: Final = datetime.date(2025, 12, 31)

# Syllables chosen to sound Latin-ish without spelling any genus we know of; the generator
# also rejects any name produced twice, so every taxon string is unique.
_GENUS_HEADS: Final = tuple(
    "Thal Vess Cor Pel Lim Sabu Orn Drem Quel Mar Tess Brov Cal Ner Ost Pym Rhod Sil Ulv "
    "Zan".split()
)
_GENUS_TAILS: Final = tuple("ora ina ella opsis aster ula ion ites aria ope ida onia".split())
_EPITHET_HEADS: Final = tuple(
    "mar salt brev gran lun pall rub vir nod spin tid fusc cren lact obsc plan".split()
)
_EPITHET_TAILS: Final = tuple("ensis ata oides ella ifera osa ina ulus icola".split())

_FIRST_NAMES: Final = tuple(
    "Maren Tobiah Ilsa Corwin Elowen Rafe Senna Audric Nyssa Bram Ottilie Caspian Wren Teodor "
    "Linnea Hollis Yara Emrys Calla Jory Annik Soren Petra Idris".split()
)
_SURNAME_HEADS: Final = tuple(
    "Ash Brack Cold Dun Fen Gull Hale Kell Marl Pen Reed Salt Thorn Wick".split()
)
_SURNAME_TAILS: Final = tuple("combe ridge haven ley mere stow worth by holt".split())

# Six zones of four stations each: SMP-N1 … SMP-R4. Depth bands follow the shore profile:
# mudflat and marsh creeks are shallow, the channel and reef run deep.
_ZONES: Final = {
    "M": (0.0, 3.0),  # marsh creeks
    "F": (0.0, 6.0),  # mudflats
    "N": (2.0, 18.0),  # north shore
    "L": (4.0, 30.0),  # lagoon
    "C": (20.0, 80.0),  # channel
    "R": (45.0, 120.0),  # outer reef
}


@dataclass(frozen=True)
class _Taxon:
    name: str
    low: float
    high: float


@dataclass(frozen=True)
class _Site:
    code: str
    low: float
    high: float


@dataclass(frozen=True)
class _Collector:
    name: str
    sites: tuple[_Site, ...]
    first_day: int
    last_day: int


def demo_schema() -> dict[str, Any]:
    """The schema of the demo collection, in the form ``Schema.from_dict`` reads.

    Examples
    --------
    >>> [f["name"] for f in demo_schema()["fields"]]
    ['taxon', 'collector', 'site_code', 'collected_on', 'depth_m']
    """
    return {
        "fields": [
            {"name": "taxon", "kind": "text", "units": 512},
            {"name": "collector", "kind": "text", "units": 512},
            {"name": "site_code", "kind": "category", "units": 128},
            {"name": "collected_on", "kind": "date", "units": 256, "tolerance_days": 14},
            {
                "name": "depth_m",
                "kind": "number",
                "units": 256,
                "tolerance": 2.0,
                "minimum": 0,
                "maximum": 500,
            },
        ]
    }


def _unique(make: Any, count: int, rng: random.Random) -> list[str]:
    seen: dict[str, None] = {}
    # The syllable lists allow far more names than asked for, so this ends quickly; the bound
    # only guards against a future edit that shrinks the lists too much.
    for _ in range(count * 100):
        seen.setdefault(make(rng), None)
        if len(seen) == count:
            return list(seen)
    raise RuntimeError(f"the syllable lists cannot make {count} distinct names")


def _taxa(rng: random.Random) -> list[_Taxon]:
    genera = _unique(lambda r: r.choice(_GENUS_HEADS) + r.choice(_GENUS_TAILS), 30, rng)
    taxa: list[_Taxon] = []
    seen: set[str] = set()
    for genus in genera:
        # A genus keeps to one band of the water column; its species spread a little around it.
        centre = rng.uniform(0.5, 100.0)
        spread = rng.uniform(2.0, 6.0) + centre * 0.25
        for _ in range(rng.randint(2, 6)):
            epithet = rng.choice(_EPITHET_HEADS) + rng.choice(_EPITHET_TAILS)
            name = f"{genus} {epithet}"
            if name in seen:
                continue
            seen.add(name)
            mid = max(0.0, centre + rng.uniform(-spread, spread))
            taxa.append(_Taxon(name, max(0.0, mid - spread), min(120.0, mid + spread)))
    return taxa


def _sites() -> list[_Site]:
    return [
        _Site(f"SMP-{zone}{i}", low, high)
        for zone, (low, high) in _ZONES.items()
        for i in range(1, 5)
    ]


def _collectors(rng: random.Random, sites: Sequence[_Site]) -> list[_Collector]:
    span = (_LAST_DATE - _FIRST_DATE).days
    names = _unique(
        lambda r: f"{r.choice(_FIRST_NAMES)} {r.choice(_SURNAME_HEADS)}{r.choice(_SURNAME_TAILS)}",
        36,
        rng,
    )
    collectors = []
    for name in names:
        # People work near each other: a home zone plus, sometimes, a neighbouring one.
        home = rng.randrange(len(sites) // 4)
        pool = list(sites[4 * home : 4 * home + 4])
        if rng.random() < 0.5:
            other = min(len(sites) // 4 - 1, max(0, home + rng.choice((-1, 1))))
            pool.extend(sites[4 * other : 4 * other + 4])
        chosen = tuple(rng.sample(pool, rng.randint(2, 4)))
        start = rng.randrange(0, span - 365)
        end = rng.randrange(start + 365, span + 1)
        collectors.append(_Collector(name, chosen, start, end))
    return collectors


def demo_records(n: int = DEMO_SIZE, seed: int = DEMO_SEED) -> list[DemoRecord]:
    """``n`` specimens as ``(specimen_id, fields)`` pairs, the same for the same ``n`` and ``seed``.

    Specimen ids are ``SMP-<year>-<number>``, numbered from 1 within each year in order of
    collection. About one specimen in a hundred has no recorded depth.
    """
    if n < 1:
        raise ValueError(f"n must be at least 1, got {n}")
    rng = random.Random(seed)
    taxa = _taxa(rng)
    collectors = _collectors(rng, _sites())
    drafts: list[tuple[datetime.date, dict[str, FieldValue]]] = []
    for _ in range(n):
        who = rng.choice(collectors)
        site = rng.choice(who.sites)
        depth = round(rng.uniform(site.low, site.high), 1)
        fitting = [t for t in taxa if t.low <= depth <= t.high]
        taxon = rng.choice(fitting) if fitting else min(taxa, key=lambda t: abs(t.low - depth))
        day = _FIRST_DATE + datetime.timedelta(days=rng.randint(who.first_day, who.last_day))
        fields: dict[str, FieldValue] = {
            "taxon": taxon.name,
            "collector": who.name,
            "site_code": site.code,
            "collected_on": day.isoformat(),
            # Probes fail now and then; a missing depth is stored as missing, not as 0.
            "depth_m": None if rng.random() < 0.01 else depth,
        }
        drafts.append((day, fields))
    # A stable sort keeps draws on the same day in draw order, so numbering is reproducible.
    drafts.sort(key=lambda item: item[0])
    records: list[DemoRecord] = []
    numbers: dict[int, int] = {}
    for day, fields in drafts:
        numbers[day.year] = numbers.get(day.year, 0) + 1
        records.append((f"SMP-{day.year}-{numbers[day.year]:05d}", fields))
    return records


def typo(text: str, rng: random.Random) -> str:
    """``text`` with one slip of the pen: a letter swapped, dropped, doubled or replaced.

    Only letters away from the first one are touched, so the result stays readable.

    Examples
    --------
    >>> typo("Thalora marensis", random.Random(3)) != "Thalora marensis"
    True
    """
    positions = [i for i, ch in enumerate(text) if ch.isalpha() and i > 0]
    if not positions:
        return text
    i = rng.choice(positions)
    slip = rng.choice(("swap", "drop", "double", "replace"))
    if slip == "swap" and i + 1 < len(text) and text[i + 1].isalpha() and text[i] != text[i + 1]:
        return text[:i] + text[i + 1] + text[i] + text[i + 2 :]
    if slip == "drop":
        return text[:i] + text[i + 1 :]
    if slip == "double":
        return text[:i] + text[i] + text[i:]
    letters = [c for c in "aeiounrstl" if c != text[i].lower()]
    return text[:i] + rng.choice(letters) + text[i + 1 :]


def smudge(
    record: dict[str, FieldValue], rng: random.Random, *, keep: int = 3
) -> dict[str, FieldValue]:
    """A fragment of ``record`` as a damaged label gives it: ``keep`` fields, one typo, depth off.

    The fields kept are chosen at random among those the record has; a kept text field gets one
    typo (the first one kept, only one per fragment), and a kept depth moves by up to 1 m, half
    the schema's tolerance.

    Examples
    --------
    >>> record = {"taxon": "Thalora marensis", "collector": "Maren Saltcombe",
    ...           "site_code": "SMP-M1", "collected_on": "2021-05-04", "depth_m": 1.5}
    >>> cue = smudge(record, random.Random(1))
    >>> len(cue), set(cue) <= set(record)
    (3, True)
    """
    present = [name for name, value in record.items() if value is not None]
    if not 1 <= keep <= len(present):
        raise ValueError(f"keep must be from 1 to {len(present)}, got {keep}")
    kept = sorted(rng.sample(present, keep), key=present.index)
    cue: dict[str, FieldValue] = {}
    typed = False
    for name in kept:
        value = record[name]
        if name in ("taxon", "collector") and isinstance(value, str) and not typed:
            value = typo(value, rng)
            typed = True
        elif name == "depth_m" and isinstance(value, float):
            value = round(max(0.0, value + rng.uniform(-1.0, 1.0)), 1)
        cue[name] = value
    return cue


def example_fragment(
    records: Sequence[DemoRecord], seed: int = DEMO_SEED
) -> Iterator[tuple[str, dict[str, FieldValue]]]:
    """Endless candidate ``(key, fragment)`` pairs for the demo's printed example request.

    Each fragment is a :func:`smudge` of four fields of a specimen with a recorded depth. The
    caller tries them in order and shows the first one the service recalls correctly, so the
    printed example is one that works.
    """
    rng = random.Random(seed + 1)
    while True:
        key, fields = records[rng.randrange(len(records))]
        if any(value is None for value in fields.values()):
            continue
        yield key, smudge(fields, rng, keep=4)


def describe_fragment(record: dict[str, FieldValue], cue: dict[str, FieldValue]) -> str:
    """How ``cue`` differs from ``record``, in words, for the demo's printed example.

    Examples
    --------
    >>> describe_fragment({"taxon": "Ulvora tidosa", "site_code": "SMP-M1", "depth_m": 2.0},
    ...                   {"taxon": "Ulvroa tidosa", "depth_m": 2.4})
    'site_code missing, taxon misspelt, depth_m approximate'
    """
    notes = [f"{name} missing" for name in record if name not in cue]
    notes += [
        f"{name} {'misspelt' if isinstance(value, str) else 'approximate'}"
        for name, value in cue.items()
        if value != record.get(name)
    ]
    return ", ".join(notes) or "exact copy"


def load_demo(service: RecallService, *, records: Sequence[DemoRecord] | None = None) -> bool:
    """Create the demo collection and import its specimens, unless it already exists.

    Returns True when this call loaded the data, False when the collection was already there
    (the call is idempotent; an existing collection is left exactly as it is).
    """
    from service.recall.errors import CollectionNotFound

    try:
        service.get_collection(DEFAULT_TEAM, DEMO_COLLECTION)
    except CollectionNotFound:
        pass
    else:
        return False
    service.create_collection(
        DEFAULT_TEAM,
        CollectionSpec(
            name=DEMO_COLLECTION,
            schema=demo_schema(),
            rule="dense",
            description="Saltmarsh Point Field Station specimen registry (invented demo data)",
            seed=DEMO_CODEC_SEED,
        ),
    )
    rows = records if records is not None else demo_records()
    report: ImportReport = service.import_memories(
        DEFAULT_TEAM,
        DEMO_COLLECTION,
        ((i, key, dict(fields)) for i, (key, fields) in enumerate(rows, start=1)),
        skip_bad=False,
    )
    return report.written > 0
