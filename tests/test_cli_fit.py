"""`specflow fit` on the demo: the readable block shows the fit, the diagnostics and the cautions;
`--json` is a FitResult that round-trips."""

from pathlib import Path

from specflow import cli
from specflow.results import FitResult

DEMO = str(Path(__file__).resolve().parents[1] / "specs" / "canal_yields.toml")


def test_fit_summary_has_every_block(capsys):
    assert cli.main(["fit", DEMO]) == 0
    out = capsys.readouterr().out
    for heading in ("IV (2SLS)", "OLS", "First stage", "Reduced form",
                    "Confidence sets", "Instrument strength", "Weak-instrument-robust tests",
                    "Overidentification", "Endogeneity", "Cautions:"):
        assert heading in out, heading
    for key in ("effective_f", "kp_rk_wald_f", "cragg_donald_f", "ar_test", "hansen_j", "anderson-rubin"):
        assert key in out, key
    assert "local average effect for compliers" in out
    assert " valid" not in out.lower()


def test_fit_weak_instrument_is_flagged(capsys):
    # the "rain only" variant of the demo has a weak first stage by design
    assert cli.main(["grid", DEMO, "--json"]) == 0
    import json

    specs = json.loads(capsys.readouterr().out)
    weak = next(s for s in specs if s["labels"].get("instruments") == "rain only")
    assert cli.main(["fit", DEMO, "--id", weak["id"]]) == 0
    out = capsys.readouterr().out
    assert "WEAK INSTRUMENTS" in out
    assert "tF" in out  # just identified: the tF interval is shown


def test_fit_json_round_trips(capsys):
    assert cli.main(["fit", DEMO, "--json"]) == 0
    text = capsys.readouterr().out
    res = FitResult.model_validate_json(text)
    assert res.status == "ok" and res.diagnostics and res.confidence_sets
    assert FitResult.model_validate_json(res.model_dump_json()) == res
