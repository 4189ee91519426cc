"""Suggested plans: the planted outlier hammers of the demo are found and evened out."""

from __future__ import annotations

import json
import tomllib

import pytest

from voicer.cli import main
from voicer.report.evenness import measure
from voicer.report.suggest import plan_toml, suggest
from voicer.tone.preset import save_preset
from voicer.tone.voicing import apply_voicing, load_voicing, parse_voicing

#: Planted faults (invented): a dull patch in the tenor (felt 0.7 of its neighbours' at
#: D3, D#3) and a hammer gone bright with wear (1.5 times harder at E4).
PLANTED = {50: 0.7, 51: 0.7, 64: 1.5}


@pytest.fixture(scope="module")
def worn(demo):
    out = demo
    for key, factor in PLANTED.items():
        out = out.with_key_values(key, {"felt_force_1mm_n": factor * float(demo.resolved["felt_force_1mm_n"][key - 21])})
    return out


@pytest.fixture(scope="module")
def suggestion(worn):
    return suggest(worn)


def test_finds_the_planted_keys_and_no_others(suggestion) -> None:
    """Harder felt sounds brighter, softer duller (common practice): the bright hammer is
    needled, the dull ones hardened, nothing else is touched."""
    assert sorted({k.key for k in suggestion.keys}) == sorted(PLANTED)
    for k in suggestion.keys:
        assert k.operation.op == ("needle" if PLANTED[k.key] > 1 else "harden"), k
        assert k.operation.keys == (k.key,)
    # The planted faults exceed one operation's safe range (30 %): each key gets a step
    # at the range's limit and then a smaller one, in order.
    for key in PLANTED:
        steps = [k for k in suggestion.keys if k.key == key]
        assert 2 <= len(steps) <= 3 and steps[0].at_limit and not steps[-1].at_limit, steps


def test_the_plan_evens_the_treated_keys(worn, suggestion) -> None:
    """The written plan, loaded back and applied, cuts the treated keys' rms deviation
    from the trend by at least 70 % in brightness and loudness (measured 96 % and 95 %),
    and no key is flagged afterwards."""
    plan = parse_voicing(tomllib.loads(plan_toml(suggestion)))
    after = measure(apply_voicing(worn, plan))
    treated = [k.key for k in suggestion.keys]
    for metric in ("brightness", "loudness_phon"):
        before = suggestion.evenness.rms_deviation(metric, keys=treated)
        assert after.rms_deviation(metric, keys=treated) <= 0.3 * before, metric
    assert after.flagged_keys() == []


def test_progress_over_the_outlier_keys(worn, suggestion) -> None:
    calls = []
    suggest(worn, evenness=suggestion.evenness, on_key=lambda done, total: calls.append((done, total)))
    assert calls == [(1, 3), (2, 3), (3, 3)]


def test_an_even_scale_gets_an_empty_plan(demo, tmp_path, capsys) -> None:
    out = tmp_path / "plan.toml"
    assert main(["suggest", "demo", "-o", str(out)]) == 0
    assert "no outlier hammer" in capsys.readouterr().out
    assert load_voicing(out).changes == ()


def test_command_writes_a_plan_and_never_overwrites_without_force(worn, tmp_path, capsys) -> None:
    preset = save_preset(worn, tmp_path / "worn.toml")
    out = tmp_path / "plan.toml"
    assert main(["suggest", str(preset), "-o", str(out), "--keys", "40-75"]) == 0
    text = out.read_text()
    assert "needling cannot be undone" in text and "E4 (64): needle" in text
    plan = load_voicing(out)
    assert {c.keys for c in plan.changes} == {(50,), (51,), (64,)}
    assert {c.op for c in plan.changes} == {"needle", "harden"}
    assert main(["suggest", str(preset), "-o", str(out), "--keys", "40-75"]) == 2
    assert "--force" in capsys.readouterr().err
    assert main(["suggest", str(preset), "-o", str(out), "--keys", "40-75", "--force"]) == 0
    assert (tmp_path / "plan.toml.bak").read_text() == text


def test_compare_reports_the_plan_on_the_outlier_keys(worn, tmp_path, capsys) -> None:
    """End to end through the commands: suggest a plan for the worn piano, then compare it.
    The JSON summary names the outlier hammers and their rms deviation before and after,
    cut by at least 70 % (the issue's check); over the whole compass the rms also holds
    the top octaves' single-dynamic dips that no voicing mends, and changes little."""
    preset = save_preset(worn, tmp_path / "worn.toml")
    plan = tmp_path / "plan.toml"
    assert main(["suggest", str(preset), "-o", str(plan)]) == 0
    capsys.readouterr()
    assert main(["compare", str(preset), "--voicing", str(plan), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)["summary"]
    assert summary["outlier_keys"] == sorted(PLANTED)
    for name in ("brightness", "loudness"):
        before, after = summary[f"{name}_rms_dev_outliers_before"], summary[f"{name}_rms_dev_outliers_after"]
        assert after <= 0.3 * before, (name, before, after)
        assert summary[f"{name}_rms_dev_after"] <= summary[f"{name}_rms_dev_before"]
