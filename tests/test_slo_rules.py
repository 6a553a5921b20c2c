"""The shipped SLO alert rules (configs/prometheus/sigmad-slo.rules.yml) under promtool.

The rules' unit-test file ``configs/prometheus/sigmad-slo.test.yml`` is generated
here from invented counter series of three shards: which alerts are expected at
each evaluation time is worked out with numpy from the same counters (the error
ratio over a window is the increase of the bad requests over the increase of all
of them, which is what the ratio of two ``rate()``s of counters sampled together
is), and every evaluation time is chosen well away from a crossing (checked
here, margin 10 %). The p99 expected of ``histogram_quantile`` is numpy's linear
interpolation (``np.interp``) in the pooled cumulative counts, Prometheus's
documented rule for histograms (from memory: linear within a bucket, the lowest
bucket starting at 0). Regenerate with ``PYTHONPATH=. python tests/test_slo_rules.py
--write``.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import need_binary

pytestmark = pytest.mark.slow   # promtool

ROOT = Path(__file__).resolve().parent.parent
RULES = ROOT / "configs" / "prometheus" / "sigmad-slo.rules.yml"
RULE_TESTS = ROOT / "configs" / "prometheus" / "sigmad-slo.test.yml"
SHARDS = ("shard-a:9410", "shard-b:9410", "shard-c:9410")
BUDGET = 0.01                      # 99 % within 300 ms
# (severity, long window, short window, burn rate), minutes, as in the rules file
BURNS = (("page", 60, 5, 14.4), ("page", 360, 30, 6.0),
         ("ticket", 1440, 120, 3.0), ("ticket", 4320, 360, 1.0))
BASE = 1e6                         # counters start high: no extrapolation to zero
SERIES = {"stream": "request_latency", "service": "checkout", "field": "ms"}


def labels(**extra: str) -> str:
    d = {**SERIES, **extra}
    return "{" + ",".join(f'{k}="{v}"' for k, v in sorted(d.items())) + "}"


def counters(step: int, minutes: int, per_step: float, bad_share) -> dict[str, np.ndarray]:
    """Cumulative counts at each sample of one shard: le 100, le 300 and all.
    ``bad_share(t)`` is the share over 300 ms in the step ending at minute t."""
    t = np.arange(0, minutes + step, step)
    bad = np.array([0.0] + [bad_share(m) for m in t[1:]]) * per_step
    total = np.concatenate([[0.0], np.full(t.size - 1, per_step)])
    good = total - bad
    return {"100.0": BASE + np.cumsum(0.6 * total), "300.0": BASE + np.cumsum(good),
            "+Inf": BASE + np.cumsum(total), "t": t}


def error_ratio(c: dict, t_eval: int, window: int) -> float:
    """1 - increase(le 300) / increase(all) over the samples in [t - window, t]."""
    t = c["t"]
    inside = (t >= t_eval - window) & (t <= t_eval)
    if inside.sum() < 2:
        return float("nan")
    first, last = np.flatnonzero(inside)[[0, -1]]
    total = c["+Inf"][last] - c["+Inf"][first]
    return float(1.0 - (c["300.0"][last] - c["300.0"][first]) / total)


def firing(c: dict, t_eval: int) -> list[str]:
    """Severities whose long and short windows both burn faster than their rate; asserts
    every ratio is at least 10 % away from its threshold (no knife-edge expectations)."""
    out = []
    for severity, long, short, rate in BURNS:
        limit = rate * BUDGET
        ratios = [error_ratio(c, t_eval, w) for w in (long, short)]
        for r in ratios:
            assert np.isnan(r) or abs(r / limit - 1) > 0.1, (t_eval, long, short, r, limit)
        if all(r > limit for r in ratios) and severity not in out:
            out.append(severity)
    return out


def series_values(values: np.ndarray) -> str:
    """promtool's series notation: runs of two or more equal steps as 'start+stepxN'."""
    v = np.asarray(values, dtype=np.float64).tolist()
    parts, i = [], 0
    while i < len(v):
        j = i
        if i + 1 < len(v):
            step = v[i + 1] - v[i]
            while j + 1 < len(v) and abs(v[j + 1] - v[j] - step) <= 1e-9 * abs(v[j]):
                j += 1
        if j - i >= 2:
            parts.append(f"{v[i]!r}{'+' if step >= 0 else '-'}{abs(step)!r}x{j - i}")
            i = j + 1
        else:
            parts.append(repr(v[i]))
            i += 1
    return " ".join(parts)


def scenario(name: str, step: int, minutes: int, bad_share, evals: list[int]) -> list[str]:
    c = counters(step, minutes, 100.0 * step, bad_share)
    lines = [f"  # {name}", f"  - interval: {step}m", "    input_series:"]
    for inst in SHARDS:
        for le in ("100.0", "300.0", "+Inf"):
            lab = labels(instance=inst, le=le, region="eu")
            lines += [f"      - series: 'sigmad_value_bucket{lab}'",
                      f"        values: '{series_values(c[le])}'"]
        lines += [f"      - series: 'sigmad_value_count{labels(instance=inst, region='eu')}'",
                  f"        values: '{series_values(c['+Inf'])}'"]
    lines.append("    alert_rule_test:")
    for t in evals:
        got = firing(c, t)
        lines += [f"      - eval_time: {t}m", "        alertname: CheckoutLatencyBudgetBurn",
                  "        exp_alerts:" + ("" if got else " []")]
        for severity in got:
            fast = severity == "page"
            lines += [
                "          - exp_labels:",
                *(f"              {k}: {v}" for k, v in sorted(
                    {**SERIES, "severity": severity, "slo": "checkout-300ms-99"}.items())),
                "            exp_annotations:",
                "              summary: Checkout requests over 300 ms are spending the 30-day "
                f"error budget{' fast' if fast else ''}."]
    return lines


def p99_check(step: int, t_eval: int) -> list[str]:
    """histogram_quantile over the pooled buckets against numpy's interpolation."""
    c = counters(step, t_eval, 100.0 * step, lambda m: 0.005)
    inc = {le: 3 * (c[le][-1] - c[le][-1 - 5 // step]) for le in ("100.0", "300.0", "+Inf")}
    want = float(np.interp(0.99 * inc["+Inf"], [0.0, inc["100.0"], inc["300.0"]],
                           [0.0, 100.0, 300.0]))
    return ["    promql_expr_test:",
            f"      - expr: 'abs(service:sigmad_latency:p99_rate5m / {want!r} - 1) < bool 1e-9'",
            f"        eval_time: {t_eval}m", "        exp_samples:",
            f"          - labels: '{labels()}'", "            value: 1"]


def drift_scenario() -> list[str]:
    """One series whose mean jumps by 2 sd at minute 120, one that wanders by 0.5 sd."""
    t = np.arange(0, 241)
    jump = np.where(t < 120, 100.0, 180.0)
    calm = 100.0 + 20.0 * np.sin(t / 15.0)
    lines = ["  # a mean that jumps by two standard deviations, and one that only wanders",
             "  - interval: 1m", "    input_series:"]
    for svc, mean in (("checkout", jump), ("search", calm)):
        lab = labels(service=svc, instance="shard-a:9410")
        lines += [f"      - series: 'sigmad_mean{lab}'", f"        values: '{series_values(mean)}'",
                  f"      - series: 'sigmad_stddev{lab}'", "        values: '40+0x240'"]
    lines.append("    alert_rule_test:")
    # fires 15 minutes after the jump while "mean an hour ago" is still the old one
    for t_eval, fires in ((110, False), (130, False), (150, True), (175, True), (200, False)):
        lines += [f"      - eval_time: {t_eval}m", "        alertname: SigmadMeanDrift",
                  "        exp_alerts:" + ("" if fires else " []")]
        if fires:
            lines += ["          - exp_labels:",
                      *(f"              {k}: {v}" for k, v in sorted(
                          {**SERIES, "instance": "shard-a:9410", "severity": "ticket"}.items())),
                      "            exp_annotations:",
                      "              summary: The mean of a sigmad series moved by more than "
                      "one standard deviation in an hour."]
    return lines


def render_rule_tests(fast_only: bool = False) -> str:
    lines = ["# Generated by tests/test_slo_rules.py from invented counters of three shards;",
             "# the expected alerts are worked out with numpy from the same counters.",
             "rule_files:", "  - sigmad-slo.rules.yml", "evaluation_interval: 1m", "tests:"]
    if not fast_only:
        lines += scenario("healthy: 0.5 % over 300 ms (burn rate 0.5), nothing fires", 1, 240,
                          lambda m: 0.005, [30, 120, 240])
        lines += p99_check(1, 120)
    lines += scenario("fast burn: 20 % over 300 ms from minute 120 to 200 tickets at once "
                      "(a short history), pages once an hour of it burns, stops paging "
                      "when the short windows recover", 1, 260,
                      lambda m: 0.005 if m <= 120 or m > 200 else 0.2,
                      [110, 125, 150, 180, 230, 250])
    if fast_only:
        return "\n".join(lines) + "\n"
    lines += scenario("slow burn: 1.5 % (burn rate 1.5) tickets after days, never pages", 10,
                      4 * 1440, lambda m: 0.015, [720, 1440, 4320, 5760])
    lines += drift_scenario()
    return "\n".join(lines) + "\n"


def test_the_shipped_rule_tests_are_the_generated_ones():
    assert RULE_TESTS.read_text() == render_rule_tests()


def test_the_expectations_cover_every_outcome():
    text = render_rule_tests()
    assert "severity: page" in text and "severity: ticket" in text
    assert text.count("exp_alerts: []") >= 5


def test_promtool_accepts_the_rules():
    promtool = need_binary("promtool")
    r = subprocess.run([promtool, "check", "rules", str(RULES)], capture_output=True, text=True)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "SUCCESS: 11 rules found" in r.stdout


def test_the_burn_rate_alerts_fire_as_expected_under_promtool():
    promtool = need_binary("promtool")
    r = subprocess.run([promtool, "test", "rules", str(RULE_TESTS)], capture_output=True,
                       text=True, cwd=RULE_TESTS.parent, timeout=300)
    assert r.returncode == 0, r.stdout + r.stderr


def test_the_rule_tests_catch_a_single_window_alert(tmp_path):
    """Dropping a short window (a single-window alert, slow to resolve) must fail."""
    promtool = need_binary("promtool")
    text = RULES.read_text()
    wrong = text.replace('ratio_rate30m{service="checkout"}', 'ratio_rate6h{service="checkout"}')
    assert wrong != text
    (tmp_path / "sigmad-slo.rules.yml").write_text(wrong)
    (tmp_path / "t.yml").write_text(render_rule_tests(fast_only=True))
    r = subprocess.run([promtool, "test", "rules", "t.yml"], capture_output=True, text=True,
                       cwd=tmp_path, timeout=300)
    assert r.returncode != 0 and "CheckoutLatencyBudgetBurn" in r.stdout + r.stderr


if __name__ == "__main__" and "--write" in sys.argv:
    RULE_TESTS.write_text(render_rule_tests())
