"""The first things a printed report says: the result, then the conditions it was measured in.

The result (dose per MU, deviation, pass or fail against the tolerance, the expanded
uncertainty with its coverage factor and effective degrees of freedom) is formatted from the
session's :class:`~chargebook.corrections.evaluate.Evaluation`; nothing is computed here. The
conditions add the monitor units the plan delivers per reading and the reference conditions.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from chargebook.acquire.protocol import SEVERITY_ORDER
from chargebook.acquire.reports.audit import step_words
from chargebook.acquire.reports.sections import (
    NOT_GIVEN,
    PENDING,
    Table,
    action_level_text,
    keyed_table,
    number,
    signed,
)
from chargebook.acquire.session.metadata import ACTION_LEVEL_KEY
from chargebook.acquire.session.plan import Plan
from chargebook.corrections.evaluate import Evaluation
from chargebook.corrections.student_t import dof_text

#: Reference conditions a session's metadata may state: key -> label (with its unit).
REFERENCE_CONDITIONS = (
    ("phantom", "phantom"),
    ("reference_depth_cm", "reference depth (cm)"),
    ("ssd_cm", "SSD (cm)"),
    ("sad_cm", "SAD (cm)"),
    ("field_size_cm", "field size at the reference plane (cm)"),
)


def verdict_text(evaluation: Evaluation) -> str:
    """Return pass or fail against the tolerance, in words (or why it is pending)."""
    band = f"±{evaluation.tolerance_pct:g} % ({evaluation.tolerance_source})"
    if evaluation.within_tolerance is None:
        return f"{PENDING}: no deviation from an expected output yet (tolerance {band})"
    if evaluation.within_tolerance:
        return f"PASS: within the tolerance of {band}"
    return f"FAIL: outside the tolerance of {band}"


def expanded_uncertainty_text(evaluation: Evaluation) -> str:
    """Return U with its coverage factor k, ν_eff and coverage probability, as evaluated."""
    if evaluation.U_expanded_pct is None:
        return f"{PENDING} (a factor is pending or a set has a single reading)"
    found = evaluation.to_dict()
    k = found.get("coverage_factor")
    if k is None:  # an evaluation that states no coverage factor of its own: U = 2 u_c
        return (
            f"{evaluation.U_expanded_pct:.2f} % (k = 2; effective degrees of freedom not evaluated)"
        )
    dof = _dof_text(found.get("effective_dof"), bool(found.get("effective_dof_infinite")))
    probability = found.get("coverage_probability")
    coverage = "" if probability is None else f", coverage probability {100 * probability:g} %"
    return f"{evaluation.U_expanded_pct:.2f} % (k = {k:.2f}, ν_eff = {dof}{coverage})"


def _dof_text(dof: float | None, infinite: bool) -> str:
    """Return ν_eff as shown everywhere (:func:`dof_text`); the JSON form carries ∞ as a flag."""
    if dof is None and not infinite:
        return NOT_GIVEN
    return dof_text(math.inf if infinite else dof)


def flag_count_text(evaluation: Evaluation) -> str:
    """Return how many flags of each severity were raised ("1 warning, 2 info" or "none")."""
    counts = {s: sum(1 for f in evaluation.flags if f.severity == s) for s in SEVERITY_ORDER}
    parts = [f"{n} {s}{'s' if n != 1 and s != 'info' else ''}" for s, n in counts.items() if n]
    return ", ".join(parts) + " (see Flags)" if parts else "none"


def result_table(
    evaluation: Evaluation | None,
    missing: str,
    metadata: Mapping[str, Any],
    context: Sequence[tuple[str, str, str]] = (),
) -> Table:
    """Return the result, first: ``context`` rows (key, label, value), then dose per MU,
    deviation, verdict, action level, U with k and ν_eff, and the flags counted."""
    rows = list(context)
    if evaluation is None:
        rows.append(("results_error", "result", missing))
    else:
        rows += [
            (
                "dose_per_MU_cGy",
                "dose per MU",
                _with_unit(number(evaluation.dose_per_MU_cGy, 4), "cGy/MU"),
            ),
            (
                "expected_cGy_per_MU",
                "expected",
                _with_unit(number(evaluation.expected_cGy_per_MU, 4, NOT_GIVEN), "cGy/MU"),
            ),
            ("deviation_pct", "deviation", _with_unit(signed(evaluation.deviation_pct, 2), "%")),
            ("verdict", "against tolerance", verdict_text(evaluation)),
            (
                ACTION_LEVEL_KEY,
                "action level",
                action_level_text(metadata),
            ),
            ("U_expanded_pct", "expanded uncertainty U", expanded_uncertainty_text(evaluation)),
            (
                "dose_Gy",
                "dose to water per reading",
                _with_unit(number(evaluation.dose_Gy, 5), "Gy"),
            ),
            ("flags", "flags", flag_count_text(evaluation)),
        ]
    return keyed_table("Result", rows, **{"class": "result"})


def _with_unit(text: str, unit: str) -> str:
    return text if text in (PENDING, NOT_GIVEN) else f"{text} {unit}"


def deliveries_table(plan: Plan | None) -> Table:
    """Return what the plan delivers per step: bias, MU per reading, readings (+ settling)."""
    if plan is None:
        return Table("Deliveries", ("step", "MU per reading"), (), note="The plan is not known.")
    rows = tuple(
        (
            step_words(index, step.purpose),
            f"{step.bias_V:+g} V",
            f"beam off, {step.duration_s:g} s"
            if step.purpose == "leakage"
            else f"{step.mu_per_reading:g} MU",
            f"{step.readings}"
            + (
                f" (+{step.settling.discard_first} settling)" if step.settling.discard_first else ""
            ),
            "optional" if step.optional else "",
        )
        for index, step in enumerate(plan.steps)
    )
    return Table(
        "Deliveries",
        ("step", "bias", "MU per reading", "readings", ""),
        rows,
        tuple(f"step-{i + 1}" for i in range(len(rows))),
        note=f"Plan {plan.name}: the monitor units the plan sets for each delivery.",
    )


def reference_conditions_table(metadata: Mapping[str, Any]) -> Table:
    """Return the reference conditions the metadata states (or say none were recorded)."""
    rows = tuple(
        (label, str(metadata[key])) for key, label in REFERENCE_CONDITIONS if metadata.get(key)
    )
    return Table(
        "Reference conditions",
        ("condition", "value"),
        rows,
        tuple(key for key, _ in REFERENCE_CONDITIONS if metadata.get(key)),
        note=""
        if rows
        else "Not recorded as fields with this measurement (see any notes above): state the "
        "phantom, depth, SSD or SAD and field size of the local code of practice beside the "
        "signatures.",
    )
