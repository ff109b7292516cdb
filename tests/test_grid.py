"""Grid expansion of the demo spec and of small inline specs: count, order, ids, rules.

The id contract (specflow/grid.py docstring): the first 12 hex digits of the SHA-256 of a
specification's canonical content -- every value that can change its numbers, nothing else
(not labels, not descriptions, not key order in the TOML, not comments).
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from specflow.errors import SpecError
from specflow.grid import Specification, baseline, expand, find
from specflow.spec import load_spec

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "specs" / "canal_yields.toml"
HEX12 = re.compile(r"^[0-9a-f]{12}$")


def grid_of(path) -> list[Specification]:
    return expand(load_spec(path))


def ids_by_labels(specs) -> dict[tuple, str]:
    return {(sp.extra_name, tuple(sorted(sp.labels.items()))): sp.id for sp in specs}


@pytest.fixture(scope="module")
def demo() -> list[Specification]:
    return grid_of(DEMO)


@pytest.fixture(scope="module")
def demo_text() -> str:
    return DEMO.read_text(encoding="utf-8")


def variant(tmp_path, text: str, old: str, new: str, name: str = "v.toml") -> list[Specification]:
    """The demo spec with one textual change, expanded (the change must apply exactly once)."""
    assert text.count(old) == 1, f"{old!r} occurs {text.count(old)} times"
    p = tmp_path / name
    p.write_text(text.replace(old, new), encoding="utf-8")
    return grid_of(p)


# ---------------------------------------------------------------------------------------------
# The demo grid


def test_demo_count(demo):
    # 3 instrument sets x 3 control sets x 3 estimators x 2 samples = 54, less the 2 x 3 x 2 = 12
    # GMM combinations with one instrument excluded by [grid], plus 2 one-off specifications
    assert len(demo) == 3 * 3 * 3 * 2 - 12 + 2 == 44


def test_baseline_first_and_only(demo):
    assert demo[0].is_baseline
    assert [sp.is_baseline for sp in demo].count(True) == 1
    assert baseline(demo) is demo[0]
    assert demo[0].labels == {"instruments": "canal + rain", "controls": "farm size, soil",
                              "estimator": "2SLS", "sample": "all farms"}
    b = demo[0]
    assert (b.outcome, b.endogenous, b.instruments) == (
        "log_yield", ("irrigated_share",), ("canal_km", "upstream_rain"))
    assert b.controls == ("log_farm_ha", "soil_index")
    assert (b.absorb, b.cluster, b.estimator, b.covariance) == (
        ("survey_round",), ("district",), "2sls", "cluster")
    assert b.filters == () and b.dataset_filter == "farm_ha > 0"


def test_order_is_the_documented_product(demo):
    """Axes in file order, the last varying fastest; each axis: baseline label, then variants
    in file order; one-off specifications last, in file order."""
    labels = [tuple(sp.labels.values()) for sp in demo if sp.extra_name is None]
    assert labels[:4] == [
        ("canal + rain", "farm size, soil", "2SLS", "all farms"),
        ("canal + rain", "farm size, soil", "2SLS", "farms of 1 ha or more"),
        ("canal + rain", "farm size, soil", "LIML", "all farms"),
        ("canal + rain", "farm size, soil", "LIML", "farms of 1 ha or more"),
    ]
    assert labels[-1] == ("rain only", "plus elevation", "LIML", "farms of 1 ha or more")
    assert [sp.extra_name for sp in demo[-2:]] == [
        "heteroskedasticity-robust SEs", "two-way clusters (district, round)"]
    assert all(sp.extra_name is None for sp in demo[:-2])


def test_order_and_ids_deterministic(demo):
    again = grid_of(DEMO)
    assert [sp.id for sp in again] == [sp.id for sp in demo]
    assert [sp.model_dump() for sp in again] == [sp.model_dump() for sp in demo]


def test_ids_are_12_hex_and_unique(demo):
    ids = [sp.id for sp in demo]
    assert all(HEX12.match(i) for i in ids)
    assert len(set(ids)) == len(ids)


def test_id_is_hash_of_content_only(demo):
    """Recomputing the id from the content; labels and names are not part of it."""
    import hashlib
    import json

    for sp in demo:
        canon = json.dumps(sp.content(), sort_keys=True, separators=(",", ":"))
        assert sp.id == hashlib.sha256(canon.encode()).hexdigest()[:12]
        assert "labels" not in sp.content() and "extra_name" not in sp.content()


def test_exclude_rule_applied(demo):
    """[grid] exclude drops GMM with a single instrument."""
    for sp in demo:
        if sp.estimator == "gmm":
            assert len(sp.instruments) == 2
    assert sum(sp.estimator == "gmm" for sp in demo) == 3 * 2  # controls x samples


def test_patches(demo):
    by = {tuple(sp.labels.values()): sp for sp in demo if sp.extra_name is None}
    sp = by[("canal only", "none", "LIML", "farms of 1 ha or more")]
    assert sp.instruments == ("canal_km",)
    assert sp.controls == ()
    assert sp.estimator == "liml"
    assert sp.filters == ("farm_ha >= 1",)
    sp = by[("canal + rain", "plus elevation", "2SLS", "all farms")]
    assert sp.controls == ("log_farm_ha", "soil_index", "elevation_m")  # add_controls appends


def test_one_off_specifications(demo):
    robust, twoway = demo[-2], demo[-1]
    base = demo[0]
    for sp in (robust, twoway):
        assert not sp.is_baseline
        assert sp.labels == base.labels  # one-offs carry the baseline labels
        assert sp.label_text() == sp.extra_name
    assert robust.content() == {**base.content(), "covariance": "robust"}
    assert twoway.content() == {**base.content(), "cluster": ("district", "survey_round"),
                                "absorb": ()}


def test_find_by_prefix(demo):
    assert find(demo, demo[5].id[:8]) is demo[5]
    from specflow.errors import SpecflowError

    with pytest.raises(SpecflowError, match="no specification has id"):
        find(demo, "zzzz")


# ---------------------------------------------------------------------------------------------
# Ids: stable under reordering, comments and relabelling; changed by every model value

# The demo spec with its tables, the keys within tables, and the variants reordered, comments
# added, some tables written as dotted keys or inline tables, and strings in the other quote
# style. Kept in the demo's order: the derived columns (their order is part of their meaning:
# a derivation may use an earlier one), the axes and their variants (they define the grid's
# order; ids are compared per label set below), and list values.
PERMUTED = '''
# a reordered copy of the demo spec
[package]
holder = "specflow developers"
licence = "MIT"

[[table]]
rows = ["se", "robust_ci", "first_stage_f", "effective_f", "overid_p", "nobs", "clusters"]
notes = "Invented demo data."
across = "instruments"
panels = ["iv", "ols", "first_stage"]
title = "Irrigation and log yield: instrument sets"
name = "instruments"

[[table]]
indicators = { "Farm size and soil" = ["log_farm_ha", "soil_index"], "Elevation" = ["elevation_m"] }
name = "controls_and_estimators"
columns = [{ controls = "none" }, { controls = "farm size, soil" }, { controls = "plus elevation" }, { estimator = "LIML" }, { estimator = "GMM" }]
title = "Irrigation and log yield: controls and estimators"

[extra]
"heteroskedasticity-robust SEs".covariance = 'robust'
"two-way clusters (district, round)" = { absorb = [], cluster = ["district", "survey_round"] }

[grid]
exclude = [{ estimator = "GMM", instruments = "rain only" }, { estimator = "GMM", instruments = "canal only" }]

[model]
covariance = "cluster"   # clustered by district
estimator = '2sls'
cluster = ["district"]
absorb = ["survey_round"]
controls = ["log_farm_ha", "soil_index"]
instruments = ["canal_km", "upstream_rain"]
endogenous = ["irrigated_share"]
outcome = "log_yield"

[axes.instruments.variants."canal only"]
instruments = ["canal_km"]
[axes.instruments.variants."rain only"]
instruments = ["upstream_rain"]
[axes.instruments]
baseline = "canal + rain"

[axes.controls]
variants."none".controls = []
variants."plus elevation" = { add_controls = ["elevation_m"] }
baseline = "farm size, soil"

[axes.estimator]
variants.LIML.estimator = "liml"
variants.GMM.estimator = "gmm"
baseline = "2SLS"

[axes.sample]
variants."farms of 1 ha or more".add_filter = "farm_ha>=1"
baseline = "all farms"

[data.farms.derive]
log_yield = 'log(yield_t_ha)'
log_farm_ha = "log(farm_ha)"

[data.farms]
redistribute = true
access = "Included in the package; regenerate with: python specs/make_demo_data.py"
licence = "CC0-1.0"
citation = "specflow developers (2026). Canal access demo data."
source = "Invented by specs/make_demo_data.py (seeded generator) for the specflow demo."
filter = "(farm_ha > 0)"
sha256 = "9264ddf811498ace856e47faac772fc963044248b0f14e6f994889740eb3ddee"
path = "data/farms.csv"

[study]
authors = ["specflow demo"]
seed = 20261202
output = "../results/canal_yields"
description = "Effect of irrigation on yield."
title = "Canal access, irrigation and farm yields (demo)"
'''


def test_ids_stable_under_reordering_and_comments(tmp_path, demo):
    p = tmp_path / "permuted.toml"
    p.write_text(PERMUTED, encoding="utf-8")
    permuted = grid_of(p)
    assert len(permuted) == len(demo)
    assert ids_by_labels(permuted) == ids_by_labels(demo)
    assert [sp.id for sp in permuted] == [sp.id for sp in demo]  # same axis/variant order


def test_ids_stable_from_another_folder(tmp_path, demo_text, demo):
    """The id hashes the dataset path as written (relative to the spec), not its location."""
    p = tmp_path / "elsewhere" / "canal.toml"
    p.parent.mkdir()
    p.write_text(demo_text, encoding="utf-8")
    assert [sp.id for sp in grid_of(p)] == [sp.id for sp in demo]


UNCHANGED = [
    ("variant label", '[axes.instruments.variants."canal only"]',
     '[axes.instruments.variants."canal alone"]'),
    ("axis baseline label", 'baseline = "2SLS"', 'baseline = "two-stage least squares"'),
    ("study title", 'title = "Canal access, irrigation and farm yields (demo)"',
     'title = "Another title"'),
    ("study description", "by distance to the nearest canal", "by the distance to a canal"),
    ("variant description", 'add_controls = ["elevation_m"]',
     'add_controls = ["elevation_m"]\ndescription = "adds elevation"'),
    ("a comment", "[model]", "# the baseline model\n[model]  # here"),
    ("data provenance", 'licence = "CC0-1.0"', 'licence = "CC-BY-4.0"'),
    ("table", 'notes = "Invented demo data."', 'notes = "Other notes."'),
    ("fuller_alpha without Fuller", 'estimator = "2sls"', 'estimator = "2sls"\nfuller_alpha = 4.0'),
    ("filter spacing", 'filter = "farm_ha > 0"', 'filter = "farm_ha>0"'),
]


@pytest.mark.parametrize("what,old,new", UNCHANGED, ids=[u[0] for u in UNCHANGED])
def test_ids_unchanged_by_non_model_edits(tmp_path, demo_text, demo, what, old, new):
    text = demo_text
    if what == "variant label":
        # the label is also used by [grid] exclude; relabel it there too
        text = text.replace('instruments = "canal only"', 'instruments = "canal alone"')
    specs = variant(tmp_path, text, old, new)
    assert [sp.id for sp in specs] == [sp.id for sp in demo]


# (what, old text, new text, whether every specification inherits the value: otherwise some
# variants or one-offs set it themselves and keep their ids)
CHANGED = [
    ("an instrument", 'instruments = ["canal_km", "upstream_rain"]',
     'instruments = ["canal_km", "other_rain"]', False),
    ("a control", 'controls = ["log_farm_ha", "soil_index"]', 'controls = ["log_farm_ha"]', False),
    ("the estimator", 'estimator = "2sls"', 'estimator = "fuller"', False),
    ("the covariance", 'covariance = "cluster"', 'covariance = "unadjusted"', False),
    ("the absorbed effects", 'absorb = ["survey_round"]', "absorb = []", False),
    ("the dataset filter", 'filter = "farm_ha > 0"', 'filter = "farm_ha > 0.5"', True),
    ("a derived column", 'log_yield = "log(yield_t_ha)"', 'log_yield = "log(yield_t_ha * 1000)"',
     True),
    ("the outcome", 'outcome = "log_yield"', 'outcome = "log_farm_ha"', True),
    ("the dataset path", 'path = "data/farms.csv"', 'path = "data/farms_v2.csv"', True),
    ("a model filter", 'covariance = "cluster"',
     'covariance = "cluster"\nfilter = "soil_index > -9"', True),
]


@pytest.mark.parametrize("what,old,new,everywhere", CHANGED, ids=[c[0] for c in CHANGED])
def test_ids_changed_by_model_values(tmp_path, demo_text, demo, what, old, new, everywhere):
    specs = variant(tmp_path, demo_text, old, new)
    assert specs[0].is_baseline and specs[0].id != demo[0].id
    assert all(HEX12.match(sp.id) for sp in specs)
    if everywhere:
        assert len(specs) == len(demo)
        assert not {sp.id for sp in specs} & {sp.id for sp in demo}


def test_variant_filter_changes_only_its_specifications(tmp_path, demo_text, demo):
    specs = variant(tmp_path, demo_text, 'add_filter = "farm_ha >= 1"', 'add_filter = "farm_ha >= 2"')
    for a, b in zip(demo, specs):
        if a.labels["sample"] == "farms of 1 ha or more" and a.extra_name is None:
            assert a.id != b.id
        else:
            assert a.id == b.id


FULLER_AXIS = '''
[axes.estimator.variants.Fuller]
estimator = "fuller"
fuller_alpha = 1.0
'''


def test_fuller_alpha_is_part_of_fuller_ids_only(tmp_path, demo_text):
    text = demo_text.replace("[axes.sample]", FULLER_AXIS + "\n[axes.sample]")
    one = variant(tmp_path, text, "fuller_alpha = 1.0", "fuller_alpha = 1.0", "a.toml")
    four = variant(tmp_path, text, "fuller_alpha = 1.0", "fuller_alpha = 4.0", "b.toml")
    assert len(one) == len(four) == 44 + 3 * 3 * 2
    for a, b in zip(one, four):
        assert a.labels == b.labels
        if a.estimator == "fuller":
            assert b.fuller_alpha == 4.0 and a.id != b.id
        else:
            assert a.id == b.id


# ---------------------------------------------------------------------------------------------
# Small inline specs: rules, one-offs, duplicates

SMALL = '''
[study]
title = "grid rules"

[data.d]
path = "d.csv"

[model]
outcome = "y"
endogenous = ["x"]
instruments = ["z1", "z2"]
controls = ["c1"]

[axes.iv]
baseline = "both"
[axes.iv.variants.z1]
instruments = ["z1"]
[axes.iv.variants.z2]
instruments = ["z2"]

[axes.ctrl]
baseline = "c1"
[axes.ctrl.variants.none]
controls = []
[axes.ctrl.variants.more]
add_controls = ["c2"]

[axes.est]
baseline = "2sls"
[axes.est.variants.liml]
estimator = "liml"
'''


def small_grid(tmp_path, extra: str = "", name: str = "s.toml") -> list[Specification]:
    p = tmp_path / name
    p.write_text(SMALL + extra, encoding="utf-8")
    return grid_of(p)


def test_small_full_product(tmp_path):
    specs = small_grid(tmp_path)
    assert len(specs) == 3 * 3 * 2
    assert specs[0].is_baseline
    assert [sp.labels["est"] for sp in specs[:2]] == ["2sls", "liml"]


def test_only_rule(tmp_path):
    specs = small_grid(tmp_path, '\n[grid]\nonly = [{ est = "liml" }, { iv = "z1", ctrl = "none" }]\n')
    labels = [sp.labels for sp in specs]
    assert all(lab["est"] == "liml" or (lab["iv"], lab["ctrl"]) == ("z1", "none") for lab in labels)
    assert len(specs) == 9 + 1  # 9 LIML, plus (z1, none, 2sls)
    assert not any(sp.is_baseline for sp in specs)  # the baseline combination is not kept


def test_exclude_rule_with_two_keys(tmp_path):
    specs = small_grid(tmp_path, '\n[grid]\nexclude = [{ iv = "z2", est = "liml" }]\n')
    assert len(specs) == 18 - 3
    assert not any(sp.labels["iv"] == "z2" and sp.labels["est"] == "liml" for sp in specs)


def test_only_and_exclude_together(tmp_path):
    specs = small_grid(tmp_path, '\n[grid]\nonly = [{ est = "liml" }]\nexclude = [{ ctrl = "more" }]\n')
    assert len(specs) == 3 * 2
    assert {sp.labels["ctrl"] for sp in specs} == {"c1", "none"}


def test_rules_leaving_nothing_is_an_error(tmp_path):
    with pytest.raises(SpecError) as exc:
        small_grid(tmp_path, '\n[grid]\nonly = [{ est = "liml" }]\nexclude = [{ est = "liml" }]\n')
    (problem,) = exc.value.problems
    assert problem.path == "grid" and "empty" in problem.message


def test_max_specifications(tmp_path):
    with pytest.raises(SpecError) as exc:
        small_grid(tmp_path, "\n[grid]\nmax_specifications = 10\n")
    (problem,) = exc.value.problems
    assert problem.path == "grid.max_specifications"
    assert "more than 10" in problem.message


def test_one_off_specs_appended_and_not_subject_to_rules(tmp_path):
    specs = small_grid(tmp_path, '\n[grid]\nonly = [{ est = "liml" }]\n\n'
                       '[extra.robust_only_z2]\ninstruments = ["z2"]\ncovariance = "unadjusted"\n'
                       '[extra.weighted]\nweights = "w"\n')
    assert len(specs) == 9 + 2
    a, b = specs[-2:]
    assert (a.extra_name, b.extra_name) == ("robust_only_z2", "weighted")
    assert a.instruments == ("z2",) and a.covariance == "unadjusted" and a.estimator == "2sls"
    assert b.weights == "w" and b.instruments == ("z1", "z2")
    assert a.labels == {"iv": "both", "ctrl": "c1", "est": "2sls"}


def test_duplicates_removed(tmp_path):
    """Combinations of different patches that give the same specification, and a one-off equal
    to a grid member, are dropped (the first occurrence is kept)."""
    extra = ('\n[axes.ctrl2]\nbaseline = "as is"\n[axes.ctrl2.variants.dropped]\n'
             'drop_controls = ["c1"]\n'
             '\n[extra.same_as_liml]\nestimator = "liml"\n')
    specs = small_grid(tmp_path, extra)
    # In each of the 3 x 2 (iv, est) cells, (ctrl, ctrl2) = (c1, dropped), (none, as is) and
    # (none, dropped) all mean "no controls"; (c1, dropped) comes first in the product order
    # (ctrl2 varies fastest) and is kept. (more, dropped) means "c2 alone", which is new.
    # So 3 x 2 x 4 = 24 specifications; the one-off equals the (both, c1, liml, as is) member.
    assert len(specs) == 24
    assert len({sp.id for sp in specs}) == len(specs)
    assert not any(sp.extra_name for sp in specs)
    kept = {(sp.labels["ctrl"], sp.labels["ctrl2"]) for sp in specs}
    assert kept == {("c1", "as is"), ("c1", "dropped"), ("more", "as is"), ("more", "dropped")}
    assert {sp.controls for sp in specs if sp.labels["ctrl2"] == "dropped"} == {(), ("c2",)}


def test_patch_add_and_drop(tmp_path):
    extra = ('\n[extra.drop_z1]\ndrop_instruments = ["z1"]\nadd_instruments = ["z3"]\n'
             '[extra.filtered]\nfilter = "c1 > 0"\n[extra.no_w]\nno_weights = true\n'
             'add_absorb = ["fe"]\n')
    specs = small_grid(tmp_path, extra)
    by = {sp.extra_name: sp for sp in specs if sp.extra_name}
    assert by["drop_z1"].instruments == ("z2", "z3")
    assert by["filtered"].filters == ("c1 > 0",)
    assert by["no_w"].weights is None and by["no_w"].absorb == ("fe",)


def test_duplicates_are_reported(tmp_path):
    """The dropped duplicates are kept on the loaded spec, so `specflow check` can say so."""
    extra = '\n[extra.same_as_liml]\nestimator = "liml"\n'
    p = tmp_path / "s.toml"
    p.write_text(SMALL + extra, encoding="utf-8")
    loaded = load_spec(p)
    expand(loaded)
    assert loaded.duplicates == [("same_as_liml", "iv=both, ctrl=c1, est=liml")]
