"""Scoring estimates against truth files: pulls, replica statistics, input errors."""

import json

import numpy as np
import pytest
import scipy.stats

from sigmasim.errors import ConfigError
from sigmasim.cli import score_command, synth_command
from sigmasim.score import load_truth, parse_estimates, pulls, score


def _truth_file(tmp_path):
    doc = {"format": "sigmasim-sidecar", "truth": {
        "a": {"value": 1.0, "error": None, "how": "exact", "source": "s", "description": "d"},
        "b": {"value": 2.0, "error": 0.3, "how": "high-statistics estimate", "source": "s",
              "description": "d"},
        "c": {"value": [0.5, 0.25], "error": None, "how": "exact", "source": "s",
              "description": "d"},
    }}
    p = tmp_path / "truth.json"
    p.write_text(json.dumps(doc))
    return p


def test_pulls_and_replica_statistics(tmp_path):
    truth = load_truth(_truth_file(tmp_path))
    rng = np.random.default_rng(0)
    err = rng.uniform(0.5, 2.0, 400)
    vals = 1.0 + err * rng.standard_normal(400)
    est = {"a": [{"value": v, "error": e} for v, e in zip(vals, err)],
           "b": {"value": 2.4, "error": 0.4}, "c[1]": {"value": 0.3, "error": 0.1}}
    rows = {r.name: r for r in score(truth, parse_estimates(est))}
    a = rows["a"]
    np.testing.assert_allclose(a.pulls, (vals - 1.0) / err)
    assert a.n == 400 and a.mean == pytest.approx(a.pulls.mean())
    assert a.width == pytest.approx(a.pulls.std(ddof=1))
    assert a.ks_p == pytest.approx(scipy.stats.kstest(a.pulls, "norm").pvalue)
    assert abs(a.width - 1) < 0.1 and a.verdict == "ok"
    assert rows["b"].pulls[0] == pytest.approx(0.4 / np.hypot(0.4, 0.3))  # truth error included
    assert rows["c[1]"].pulls[0] == pytest.approx(0.5)
    assert pulls([3.0], [2.0], 1.0)[0] == 1.0


def test_verdicts_catch_dishonest_errors(tmp_path):
    truth = load_truth(_truth_file(tmp_path))
    rng = np.random.default_rng(1)
    z = rng.standard_normal(300)
    for factor, verdict in [(0.5, "errors too small"), (2.0, "errors too large")]:
        est = [{"name": "a", "value": 1.0 + zz, "error": factor} for zz in z]
        (row,) = score(truth, parse_estimates(est))
        assert row.verdict == verdict
    est = [{"name": "a", "value": 1.5 + zz, "error": 1.0} for zz in z]
    assert score(truth, parse_estimates(est))[0].verdict == "biased"


def test_command_prints_a_table(tmp_path, capsys):
    synth_command("ar1", str(tmp_path / "s"), 1, rho="0.5", length=200, replicas=20)
    x = np.load(tmp_path / "s.npz")["x"]
    est = [{"name": "mean", "value": float(r.mean()), "error": 0.2} for r in x]
    est.append({"name": "tau_int", "value": 1.4, "error": 0.2})
    (tmp_path / "e.json").write_text(json.dumps(est))
    # an error of 0.2 on these means is too large (width 0.62): a bad verdict, exit status 1
    assert score_command(str(tmp_path / "s.json"), str(tmp_path / "e.json")) == 1
    out = capsys.readouterr().out
    assert "mean" in out and "tau_int" in out and "KS p" in out and "errors too large" in out


@pytest.mark.parametrize("content, match", [
    ("{not json", "not valid JSON"),
    ('[{"name": "zzz", "value": 1, "error": 1}]', "unknown quantity 'zzz'"),
    ('[{"name": "a", "value": 1}]', "'value' and 'error'"),
    ('[{"name": "a", "value": 1, "error": 0}]', "error must be > 0"),
    ('[{"name": "a", "value": "x", "error": 1}]', "finite number"),
    ('{"c": {"value": 1, "error": 1}}', "name one element"),
    ('{"c[5]": {"value": 1, "error": 1}}', "out of range"),
    ("3", "estimates must be"),
    ("[]", "no estimates"),
])
def test_bad_estimates_are_one_line_errors(tmp_path, content, match):
    t = _truth_file(tmp_path)
    (tmp_path / "e.json").write_text(content)
    with pytest.raises(ConfigError, match=match) as ei:
        score_command(str(t), str(tmp_path / "e.json"))
    assert "\n" not in str(ei.value)


def test_bad_truth_file(tmp_path):
    (tmp_path / "e.json").write_text("[]")
    with pytest.raises(ConfigError, match="cannot read"):
        score_command(str(tmp_path / "nope.json"), str(tmp_path / "e.json"))
    (tmp_path / "b.npz").write_bytes(b"PK\x03\x04\x80\x81")
    with pytest.raises(ConfigError, match="not a JSON text file"):
        score_command(str(tmp_path / "b.npz"), str(tmp_path / "e.json"))
    (tmp_path / "t.json").write_text('{"arrays": []}')
    with pytest.raises(ConfigError, match="no 'truth'"):
        score_command(str(tmp_path / "t.json"), str(tmp_path / "e.json"))


def test_command_exits_1_on_a_bad_verdict_and_keeps_columns_apart(tmp_path, capsys):
    truth = _truth_file(tmp_path)
    rng = np.random.default_rng(2)
    z = rng.standard_normal(200)
    est = [{"name": "a", "value": 1.5 + zz, "error": 1.0} for zz in z]  # biased by half an error
    (tmp_path / "e.json").write_text(json.dumps(est))
    assert score_command(str(truth), str(tmp_path / "e.json")) == 1
    out = capsys.readouterr().out
    assert "biased" in out and "exit status 1" in out
    head, rule, row = out.splitlines()[:3]
    cols = head.split()
    assert cols[:3] == ["quantity", "truth", "how"]
    # every cell is separated by at least two spaces
    fields = [f for f in row.split("  ") if f.strip()]
    assert len(fields) == 8, row


def test_command_exits_0_when_every_verdict_is_ok(tmp_path, capsys):
    truth = _truth_file(tmp_path)
    z = np.random.default_rng(3).standard_normal(200)
    est = [{"name": "a_quantity_name_longer_than_22", "value": 1.0 + zz, "error": 1.0} for zz in z]
    doc = json.loads(truth.read_text())
    doc["truth"]["a_quantity_name_longer_than_22"] = doc["truth"]["a"]
    truth.write_text(json.dumps(doc))
    (tmp_path / "e.json").write_text(json.dumps(est))
    assert score_command(str(truth), str(tmp_path / "e.json")) == 0
    row = capsys.readouterr().out.splitlines()[2]
    assert row.startswith("a_quantity_name_longer_than_22  ")
