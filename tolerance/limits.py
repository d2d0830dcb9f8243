"""Verdicts: from counted failures to pass, fail or "not enough samples to tell".

A criterion passes a sample when the sample converged and its metric lies within the limits
(:meth:`tolerance.protocol.Criterion.passes`). Over the run, a criterion's failure rate is judged
against the study's allowed rate ``[run] max_failure_rate`` (default 0):

- allowed rate 0: the criterion passes only when no sample failed it;
- allowed rate r > 0: it passes when the upper end of the failure rate's exact interval is at or
  below r, fails when the lower end is above r, and is undecided otherwise (more samples needed).

Samples whose solver did not converge are neither passes nor failures of a criterion; they are
counted as ``not_converged`` and count against the overall yield.
"""

from __future__ import annotations

PASS, FAIL, UNDECIDED = "pass", "fail", "undecided"


def verdict(failures: int, ci_low: float, ci_high: float, allowed_rate: float) -> str:
    """Verdict of one criterion (or of the overall failure rate)."""
    if allowed_rate <= 0:
        return PASS if failures == 0 else FAIL
    if ci_high <= allowed_rate:
        return PASS
    if ci_low > allowed_rate:
        return FAIL
    return UNDECIDED


def overall(verdicts: list[str], not_converged: int) -> str:
    """Overall verdict: every criterion must pass and every sample must have converged."""
    if FAIL in verdicts or not_converged:
        return FAIL  # a unit the model cannot solve is not shown to work
    if UNDECIDED in verdicts:
        return UNDECIDED
    return PASS


def exit_status(overall_verdict: str) -> int:
    """CLI exit status: 0 every limit met, 1 otherwise (a failure or not enough samples)."""
    return 0 if overall_verdict == PASS else 1
