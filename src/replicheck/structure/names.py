"""Name hints: what a column's name suggests about its role.

Name hints are one input among several; the structure of the data decides.
Matching works on lower-cased name tokens split at non-letters and at
letter/digit boundaries, so ``Tank_ID``, ``tankNo`` and ``tank2`` all carry the
token ``tank``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

# Physical containers that receive a treatment as a whole. A label of one of
# these that repeats under every treatment level is most likely a local number
# ("tank 1" of each feed), not one shared physical container. Replicate
# numbers ("rep 1" of each treatment) behave the same way.
CONTAINER_WORDS: frozenset[str] = frozenset(
    [
        "tank",
        "wafer",
        "slide",
        "aquarium",
        "aquaria",
        "cage",
        "pen",
        "pot",
        "dish",
        "flask",
        "jar",
        "bottle",
        "box",
        "plot",
        "enclosure",
        "pond",
        "hive",
        "colony",
        "mesocosm",
        "microcosm",
        "raceway",
        "cuvette",
        "vial",
        "tube",
        "container",
        "culture",
        "bag",
        "bucket",
        "basin",
        "net",
        "vat",
        "barrel",
        "cask",
        "tub",
        "kennel",
        "stall",
        "hutch",
        "terrarium",
        "cohort",
        "rep",
        "replicate",
        "tnk",
        "aq",
        "cg",
        "plt",
        "becken",
        "kafig",
        "kaefig",
        "topf",
        "parzelle",
        "bac",
        "parcelle",
        "boite",
        "tanque",
        "jaula",
        "estanque",
        "aquario",
        "maceta",
        "parcela",
        "caja",
        "gaiola",
        "vaso",
        "gabbia",
        "vasca",
        "kooi",
        "bak",
    ]
)

# Blocks of the design: groupings that hold units under several treatments
# and carry an effect of their own, whatever else their cells are.
BLOCK_WORDS: frozenset[str] = frozenset(
    {"block", "blk", "bloc", "bloque", "blok", "blocco", "pair", "stratum", "strata"}
)

# Places that hold many units, often under several treatments at once (a
# bench, a shelf, a block). When crossed with treatment they are blocks, not
# renumbered units; when a treatment sits in one of them they can still be
# its unit (one kiln per glaze).
LOCATION_WORDS: frozenset[str] = frozenset(
    [
        "bench",
        "rack",
        "shelf",
        "room",
        "bed",
        "tray",
        "incubator",
        "cabinet",
        "greenhouse",
        "glasshouse",
        "tunnel",
        "chamber",
        "kiln",
        "oven",
        "furnace",
        "reactor",
        "bioreactor",
        "fermenter",
        "fermentor",
        "barn",
        "coop",
        "paddock",
        "transect",
        "quadrat",
        "well",
        "plate",
        "stream",
        "pool",
        "bay",
        "zone",
        "area",
        "ch",
        "kammer",
        "schale",
        "beet",
        "enceinte",
        "placa",
        "platte",
        "plaque",
        "camara",
        "piastra",
    ]
)

# Groupings of time, processing or origin that can carry a treatment.
PROCESS_WORDS: frozenset[str] = frozenset(
    {
        "batch",
        "run",
        "lot",
        "litter",
        "clutch",
        "brood",
        "nest",
        "family",
        "mother",
        "dam",
        "sire",
        "farm",
        "site",
        "field",
        "location",
        "station",
        "lab",
        "laboratory",
        "centre",
        "center",
        "clinic",
        "hospital",
        "school",
        "sch",
        "class",
        "classroom",
        "cls",
        "teacher",
        "tch",
        "instructor",
        "tutor",
        "study",
        "ward",
        "village",
        "herd",
        "flock",
        "population",
        "operator",
        "worker",
        "technician",
        "analyst",
        "machine",
        "instrument",
        "assay",
        "gel",
        "array",
        "chip",
        "slide",
        "lane",
        "flowcell",
        "sequencing",
        "experiment",
        "exp",
        "trial",
        # German, French, Spanish, Portuguese, Italian, Dutch
        "charge",
        "lauf",
        "durchgang",
        "wurf",
        "standort",
        "portee",
        "lote",
        "camada",
        "sitio",
        "corrida",
        "ninhada",
        "nidiata",
        "partij",
    }
)

# Times: groupings of when things were done or measured. They hold units
# (a day can be a unit of a treatment processed that day) but never restart
# another column's labels: subjects are measured again in every period.
TIME_WORDS: frozenset[str] = frozenset(
    {
        "day",
        "date",
        "hour",
        "hr",
        "minute",
        "session",
        "week",
        "month",
        "time",
        "shift",
        "wave",
        "round",
        "season",
        "year",
        "period",
        "phase",
        "occasion",
        "visit",
        "harvest",
        "tag",
        "datum",
        "sitzung",
        "woche",
        "semaine",
        "semana",
        "settimana",
        "jour",
        "seance",
        "dia",
        "fecha",
        "sesion",
        "sessao",
        "giorno",
        "sessione",
        "dag",
    }
)

# Individuals: units that can receive one treatment, or, when crossed with
# treatment, every treatment in turn (a within-subject design).
INDIVIDUAL_WORDS: frozenset[str] = frozenset(
    {
        "subject",
        "animal",
        "donor",
        "patient",
        "participant",
        "respondent",
        "resp",
        "volunteer",
        "child",
        "infant",
        "student",
        "pupil",
        "individual",
        "mouse",
        "rat",
        "fish",
        "plant",
        "tree",
        "bird",
        "dog",
        "cow",
        "pig",
        "mice",
        "person",
        "subj",
        "sub",
        "judge",
        "rater",
        "taster",
        "panelist",
        "panellist",
        "assessor",
        "observer",
        "pt",
        "pid",
        "tier",
        "proband",
        "sujet",
        "sujeto",
        "paciente",
        "animale",
        "soggetto",
        "dier",
    }
)

# Words that mark a column as another label of the treatment itself.
LABEL_WORDS: frozenset[str] = frozenset(
    {
        "code",
        "label",
        "arm",
        "condition",
        "cond",
        "trt",
        "treat",
        "treatment",
        "group",
        "grp",
        "level",
        "dose",
        "diet",
        "feed",
        "regime",
        "regimen",
        "name",
        "abbr",
        "abbreviation",
        "key",
        "factor",
    }
)

ID_WORDS: frozenset[str] = frozenset(
    {
        "id",
        "row",
        "obs",
        "observation",
        "index",
        "idx",
        "no",
        "nr",
        "num",
        "number",
        "seq",
        "sample",
        "specimen",
        "record",
        "uuid",
        "key",
    }
)


_DERIVED = re.compile(r"^([^\[\]]+)\[.*\]$")


def tokens(name: str) -> list[str]:
    """Lower-case word tokens of a column name (split at non-letters and letter/digit edges).

    A grouping derived by a hidden-grouping scan is named ``word[sources]``
    (``session[sampled_at]``, ``zone[x,y]``); only the word before the bracket
    counts, so the source columns' names do not colour the hint.
    """
    derived = _DERIVED.match(str(name))
    if derived is not None:
        name = derived.group(1)
    spaced = re.sub(r"([a-z])([A-Z])", r"\1 \2", str(name))
    raw = re.split(r"[^0-9A-Za-zÀ-ÿ]+|(?<=[A-Za-zÀ-ÿ])(?=\d)|(?<=\d)(?=[A-Za-zÀ-ÿ])", spaced)
    out: list[str] = []
    for t in raw:
        if t and not t.isdigit():
            out += _run_together(_fold(t.lower()))
    return out


# Suffixes that statistics packages' naming habits glue to a word (schoolid, childid,
# plotno, cagenum): split off when what precedes them is a known word.
_GLUED = ("id", "num", "nr", "no", "code", "idx")


def _run_together(token: str) -> list[str]:
    if token in _KNOWN:
        return [token]
    for suffix in _GLUED:
        stem = token[: -len(suffix)]
        if token.endswith(suffix) and len(stem) >= 3 and stem in _KNOWN:
            return [stem, suffix]
    return [token]


_FOLD = {
    "ä": "a",
    "ö": "o",
    "ü": "u",
    "ß": "ss",
    "é": "e",
    "è": "e",
    "ê": "e",
    "à": "a",
    "á": "a",
    "â": "a",
    "í": "i",
    "ó": "o",
    "ô": "o",
    "ú": "u",
    "ç": "c",
    "ñ": "n",
    "ã": "a",
    "õ": "o",
}


def _fold(token: str) -> str:
    return "".join(_FOLD.get(ch, ch) for ch in token)


_KNOWN: frozenset[str] = (
    CONTAINER_WORDS
    | BLOCK_WORDS
    | LOCATION_WORDS
    | TIME_WORDS
    | PROCESS_WORDS
    | INDIVIDUAL_WORDS
    | LABEL_WORDS
    | ID_WORDS
)


@dataclass(frozen=True)
class NameHint:
    """What a column's name suggests."""

    kind: str  # container, block, location, time, process, individual, label, identifier, none
    word: str | None

    @property
    def suggests_unit(self) -> bool:
        return self.kind in {"container", "block", "location", "time", "process", "individual"}


def name_hint(name: str) -> NameHint:
    """Classify a column name by the first matching word family.

    Unit words win over label words ("cage_code" is a cage), label words over
    identifier words.
    """
    toks = tokens(name)
    for kind, words in (
        ("container", CONTAINER_WORDS),
        ("block", BLOCK_WORDS),
        ("location", LOCATION_WORDS),
        ("time", TIME_WORDS),
        ("process", PROCESS_WORDS),
        ("individual", INDIVIDUAL_WORDS),
    ):
        for t in toks:
            if t in words or (t.endswith("s") and t[:-1] in words):
                return NameHint(kind, t)
    for t in toks:
        if t in LABEL_WORDS:
            return NameHint("label", t)
    for t in toks:
        if t in ID_WORDS:
            return NameHint("identifier", t)
    return NameHint("none", None)
