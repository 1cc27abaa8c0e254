"""The own-row test of a PID run over its first modules.

PID takes most from the modules nearest a string's negative end and fades along the string
(IEC TS 62446-3: the thermal pattern of PID, modules at one end of a string with warmer cells,
mostly next to the frame; common practice: the gradient along the string). Against the run's
own table row, whose shared shape comes from the module's row mates - along a PID string PID
modules themselves - the pattern holds mainly at the negative end; the run's evidence there is
combined over its first m modules (Stouffer's method), the best m of at least two.
"""
from __future__ import annotations

import numpy as np
from scipy.stats import combine_pvalues, norm
from test_classify import Plant, found

import pvscan.diagnose.classify as classify_module
import pvscan.diagnose.patterns.pid as pid_module


def _stouffer(z):
    """Combined z of independent z scores by Stouffer's method, as scipy computes it."""
    p = combine_pvalues(norm.sf(np.asarray(z, dtype=float)), method="stouffer").pvalue
    return float(norm.isf(p))


def test_best_prefix_is_stouffers_best_over_two_or_more(rng):
    # the highest combined z over the first m >= 2 scores (scipy.stats.combine_pvalues, Stouffer);
    # NaN counts as a score of 0; a single score is its own value
    for n in range(2, 12):
        z = rng.normal(0.5, 1.5, n)
        z[rng.random(n) < 0.1] = np.nan
        want = max(_stouffer(np.nan_to_num(z[:m], nan=0.0)) for m in range(2, n + 1))
        assert abs(pid_module._best_prefix(z, 2) - want) < 1e-6, (n, z)
    assert pid_module._best_prefix(np.array([1.7]), 2) == 1.7


def test_pid_run_whose_own_row_pattern_fades_early_is_kept(rng, monkeypatch):
    # a PID string of six modules (30 % of the first module's output fading to a third: IEC TS
    # 62446-3 pattern, common-practice gradient); against its own table row its modules after the
    # second read their edge ring 0.6 K cooler (their row mates' shared shape is the PID pattern
    # itself), so over the whole run the own-row evidence sinks below the bar while its first two
    # modules hold it. The run is kept by its best first modules; over the whole run (the rule
    # before) it is lost on most plants. Measured on test seeds 0-5 and the default (8 plants
    # each): kept 8 of 8, whole run 0 of 8; no false PID module.
    real = classify_module.pattern_pid
    A, C = 12, 6
    ii, jj = np.indices((A, C))
    edge = (ii == 0) | (ii == A - 1) | (jj == 0) | (jj == C - 1)
    tail: list[int] = []

    def faded(F, cfg, groups, pos, is_string, exclude):
        F.R = F.R.copy()
        F.R[tail] -= np.where(edge, 0.6, 0.0)[None]
        return real(F, cfg, groups, pos, is_string, exclude)

    monkeypatch.setattr(classify_module, "pattern_pid", faded)
    whole = lambda z, m_min: float(np.nansum(z) / np.sqrt(len(z)))  # noqa: E731
    kept = kept_whole = false = 0
    n_plants = 8
    for _ in range(n_plants):
        p = Plant(rng, strings="row")
        run = [int(i) for i in p.pid("T1-0-R2", 6, f0=0.3)]
        tail[:] = run[2:]
        an, _ = p.run()
        got = found(an)
        kept += got.get(run[0]) == "pid"
        false += sum(1 for i, d in got.items() if d == "pid" and i not in run)
        with monkeypatch.context() as m:
            m.setattr(pid_module, "_best_prefix", whole)
            an0, _ = p.run()
        kept_whole += found(an0).get(run[0]) == "pid"
    assert false == 0, false
    assert kept >= 7 and kept >= kept_whole + 4, (kept, kept_whole)
