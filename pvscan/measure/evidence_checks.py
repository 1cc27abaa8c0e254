"""Validity checks of what the classification measured about the flight as a whole.

Each reads :attr:`pvscan.diagnose.results.Diagnosis.evidence` (:func:`evidence_checks` runs them
all; ``pipeline._evidence_validity`` adds them to the flight's
:class:`~pvscan.measure.validity.Validity`): ``string_reference``, ``module_spread``,
``row_cluster``, ``row_edge``, ``unexplained_pid``, ``unexplained_pid_pattern``,
``unexplained_pid_tail`` and ``cold_run``. Every check is a dict ``name, value, limit, kind, unit, passed, source,
message`` (:func:`pvscan.measure.checks.make_check`).
"""
from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from pvscan.measure.checks import Check
from pvscan.measure.checks import finite as _finite
from pvscan.measure.checks import make_check as _check
from pvscan.measure.checks import validity_settings as _validity_settings

__all__ = ["string_reference_check", "module_spread_check", "row_cluster_check", "row_edge_check",
           "unexplained_pid_check", "unexplained_pid_pattern_check", "unexplained_pid_tail_check",
           "cold_run_check", "evidence_checks"]


def string_reference_check(evidence: Mapping[str, Any], settings: Mapping[str, Any] | None = None) -> Check:
    """``string_reference``: the spread of healthy modules' excess over modules outside their
    own string (or table row), in module-to-module spreads [-] (at most ``[validity]
    max_other_spread_ratio``).

    Open strings and PID are judged against modules outside the string, since a string
    raised as a whole would be its own reference. On an ordinary plant that reference
    scatters about as much as module against module; when it scatters far more, the plant
    holds too few strings (or table rows) for it, or one group's offset (an open string
    filling half a small plant, and the mirror offset it lends the rest) widens it: the
    string-level findings, found or missed, are then not measured. Unknown (passes) when the
    classification measured no spread.
    """
    st = _validity_settings(settings)
    lim = float(st["max_other_spread_ratio"])
    sig = _finite(evidence.get("module_spread_k"))
    other = _finite(evidence.get("other_spread_k"))
    value = other / sig if sig is not None and other is not None and sig > 0 else None
    groups = evidence.get("groups")
    what = "strings" if evidence.get("strings_known", False) else "table rows"
    if value is None:
        msg = "string reference: unknown (no spread measured)"
    else:
        msg = (f"string reference: modules against those outside their own string scatter {value:.2f} x as much as "
               f"module against module ({other:.2f} K vs {sig:.2f} K over {groups} {what}; at most "
               f"{lim:g} x)")
        if value > lim:
            msg += ": open strings and PID cannot be measured on this plant (failed)"
    c = _check("string_reference", value, lim, "max", "", "module spread (pvscan.diagnose.classify; calibrated)",
               message=msg)
    c.update({"module_spread_k": sig, "other_spread_k": other, "groups": groups})
    return c


def _message(title: str, value: float | None, limit: float, unknown: str, nothing: str | None,
             found: str | None, failed: str) -> str:
    """The message shape of the checks of what the classification measured about the flight:
    ``title: unknown`` when ``value`` is None, ``title: nothing`` when nothing was found (``found``
    None), else ``title: found``, with ``: failed (failed)`` after it when ``value`` exceeds
    ``limit``."""
    if value is None:
        return f"{title}: {unknown}"
    if found is None:
        return f"{title}: {nothing}"
    return f"{title}: {found}" + (f": {failed} (failed)" if value > limit else "")


def row_cluster_check(evidence: Mapping[str, Any], settings: Mapping[str, Any] | None = None) -> Check:
    """``row_cluster``: -log10 of the chance that the densest stretch of a table row holds as
    many findings of faults of single modules as it does, were they independent from module to
    module at the flight's own rate (binomial, Bonferroni over every stretch; at most
    ``[validity] max_row_cluster_score``), as the classification measured it
    (``row_cluster_score``).

    Faults of cells, bypass diodes and junction boxes strike module by module; findings that
    crowd a stretch of a row follow an image artefact along it (a mosaic seam running through
    the modules, a reflection), and the findings of the flight are then not measured. Unknown
    (passes) when the classification measured nothing.
    """
    st = _validity_settings(settings)
    lim = float(st["max_row_cluster_score"])
    value = _finite(evidence.get("row_cluster_score"))
    mods = list(evidence.get("row_cluster_modules") or [])
    k = int(evidence.get("row_cluster_findings") or 0)
    rate = _finite(evidence.get("row_cluster_rate"))
    found = nothing = None
    if value is not None and mods:
        where = mods[0] if len(mods) == 1 else f"{mods[0]} .. {mods[-1]}"
        found = (f"{k} of {len(mods)} modules of one table row ({where}) hold findings of single modules at a "
                 f"flight rate of {100.0 * (rate or 0.0):.1f} %: a chance of 1 in {10 ** min(value, 99.0):,.0f} "
                 f"anywhere on the flight (score {value:.2f}; at most {lim:g})")
    elif value is not None:
        nothing = f"findings of single modules do not crowd along any table row (score {value:.2f}; at most {lim:g})"
    msg = _message("row cluster", value, lim, "unknown (no findings measured)", nothing, found,
                   "the findings follow an image artefact along the row (a mosaic seam, a reflection); "
                   "check the ortho there")
    c = _check("row_cluster", value, lim, "max", "", "binomial chance, Bonferroni (pvscan.diagnose.classify)",
               message=msg)
    c.update({"modules": mods, "findings": k, "rate": rate})
    return c


def _unexplained_check(name: str, evidence: Mapping[str, Any], key: str, settings: Mapping[str, Any] | None,
                       title: str, unknown: str, nothing: str, found: str, **fields: Any) -> Check:
    """The shape every ``unexplained_*`` check shares: a strength [robust SD] of a pattern no
    finding takes in (the evidence's ``KEY_z``, at its module ``KEY_module``), at most ``[validity]
    max_NAME_z``; the message names the module (``found``, formatted with ``module``, ``value``
    and ``fields``), says nothing was there (``nothing``) or that the value is unknown
    (``unknown``, passes)."""
    value, module = _finite(evidence.get(f"{key}_z")), evidence.get(f"{key}_module")
    limit = float(_validity_settings(settings)[f"max_{name}_z"])
    msg = _message(title, value, limit, unknown, f"{nothing} (at most {limit:g})",
                   None if module is None or value is None else found.format(module=module, value=value, **fields)
                   + f" (at most {limit:g})", "a string-level fault may be missed; check that string")
    c = _check(name, value, limit, "max", "robust SD", "PID pattern (pvscan.diagnose.classify; calibrated)",
               message=msg)
    c.update({"module": module})
    return c


def row_edge_check(evidence: Mapping[str, Any], settings: Mapping[str, Any] | None = None) -> Check:
    """``row_edge``: the largest departure [K] of a table row's median edge line of cells from the
    rows at the same position in their tables (``row_edge_offset_k``, see
    :func:`pvscan.diagnose.classify`), at most ``[validity] max_row_edge_offset_k``.

    Above it a row's footprints sit across its modules (one edge line on the gap and the ground
    beside it), and the cell patterns of that row are not measured.
    """
    lim = float(_validity_settings(settings)["max_row_edge_offset_k"])
    value = _finite(evidence.get("row_edge_offset_k"))
    mods = list(evidence.get("row_edge_modules") or [])
    found = None
    if value is not None and mods:
        found = (f"table row {mods[0]} .. {mods[-1]} reads its {evidence.get('row_edge_line')} lines "
                 f"{_finite(evidence.get('row_edge_line_k')) or 0.0:+.2f} K off the module against "
                 f"{_finite(evidence.get('row_edge_reference_k')) or 0.0:+.2f} K on rows like it: "
                 f"{value:.2f} K apart (at most {lim:g} K)")
    msg = _message("row edge", value, lim, "unknown (no rows compared)",
                   f"fewer than two table rows to compare (at most {lim:g} K)", found,
                   "the row's footprints sit across its modules (relief, a seam shifting part of a table); "
                   "its cell patterns are not measured; check the placement there")
    c = _check("row_edge", value, lim, "max", "K", "edge lines of table rows (pvscan.diagnose.classify; calibrated)",
               message=msg)
    c.update({"modules": mods})
    return c


def unexplained_pid_check(evidence: Mapping[str, Any], settings: Mapping[str, Any] | None = None) -> Check:
    """``unexplained_pid``: the PID edge-ring contrast [robust SD] of the strongest warm module
    that could start a PID string and is in no finding (at most ``[validity]
    max_unexplained_pid_z``), as the classification measured it (``pid_unexplained_z``).

    A pattern that strong would start a PID run by itself; when no finding takes it in, the
    string-level fault behind it (PID fading along the string, a string under a cloud shadow)
    was not placed, and the flight's string findings are not measured. Unknown (passes) when
    PID was not looked for.
    """
    return _unexplained_check(
        "unexplained_pid", evidence, "pid_unexplained", settings, "unexplained PID",
        "unknown (PID not looked for)", "no warm module outside the findings could start a PID string",
        "module {module} could start a PID string, runs warm and shows the edge-ring pattern at z {value:.1f}, "
        "but no finding takes it in")


def unexplained_pid_pattern_check(evidence: Mapping[str, Any], settings: Mapping[str, Any] | None = None) -> Check:
    """``unexplained_pid_pattern``: with strings known, the PID edge-ring contrast [robust SD] that
    the first modules of a string in no finding show against both references, modules of other
    rows and their own table row (the lesser of the two, combined ``sum(z) / sqrt(m)`` over the
    best ``m`` modules from the negative end within the first ``[classify] pid_max_position`` of
    the string, ``pid_pattern_unexplained_z``), at most ``[validity] max_unexplained_pid_pattern_z``.

    A row's artefact (a seam, a reflection band) shows against one reference only; a pattern both
    see is the modules' own. Unlike ``unexplained_pid`` the modules need not run warm: the warmth
    is measured against modules outside the string, which a small plant or a shadow can bias, and
    a PID string taken for not warm is missed; nor need one module carry the pattern by itself:
    PID fades along the string, and a faint string shows over several modules. Unknown (passes)
    without strings.
    """
    m = int(evidence.get("pid_pattern_unexplained_modules") or 1)
    return _unexplained_check(
        "unexplained_pid_pattern", evidence, "pid_pattern_unexplained", settings, "unexplained PID pattern",
        "unknown (strings not known)", "no module outside the findings could start a PID string",
        ("module {module} at a string's negative end shows the edge-ring pattern against other rows and its "
         "own row at z {value:.1f}" if m == 1 else
         "the first {m} modules of a string from {module} (its negative end) show the edge-ring pattern "
         "against other rows and their own row at combined z {value:.1f}") + ", but no finding takes it in",
        m=m)


def module_spread_check(evidence: Mapping[str, Any], settings: Mapping[str, Any] | None = None) -> Check:
    """``module_spread``: the robust module-to-module spread of healthy modules' delta T
    (``module_spread_k`` [K]) over the median open-module rise ``eta * G / U``
    (``open_rise_k`` [K], Faiman), at most ``[validity] max_module_spread_ratio`` [-].

    Every finding of the classification is a contrast against healthy modules, judged in
    their spreads: a fault is told from a healthy module when its heat, a share of the
    open-module rise, stands several spreads clear. When the spread is a large share of the
    rise, the fainter faults (PID fading along a string, a bypassed substring, soiling) sit
    inside the healthy scatter and are missed, and a reference drawn from a plant where many
    modules are anomalous (a small plant, a string-level fault filling a good part of it)
    scatters the same way. Unknown (passes) when either is not measured.
    """
    lim = float(_validity_settings(settings)["max_module_spread_ratio"])
    sig = _finite(evidence.get("module_spread_k"))
    rise = _finite(evidence.get("open_rise_k"))
    value = sig / rise if sig is not None and rise is not None and rise > 0 else None
    if value is None:
        msg = "module spread: unknown (no spread or open-module rise measured)"
    else:
        msg = (f"module spread: healthy modules scatter {sig:.2f} K, {value:.2f} of the open-module rise "
               f"({rise:.2f} K at the flight's irradiance and wind; at most {lim:g})")
        if value > lim:
            msg += (": faults fainter than a few spreads (PID, bypassed substrings, soiling) cannot be told from "
                    "healthy modules, or too many modules are anomalous for a reference drawn from the plant; "
                    "check the result by hand (failed)")
    c = _check("module_spread", value, lim, "max", "", "module spread over the Faiman open-module rise "
               "(pvscan.diagnose.classify; calibrated)", message=msg)
    c.update({"module_spread_k": sig, "open_rise_k": rise})
    return c


def unexplained_pid_tail_check(evidence: Mapping[str, Any], settings: Mapping[str, Any] | None = None) -> Check:
    """``unexplained_pid_tail``: the combined PID evidence [robust SD] of modules in no finding past
    the end of a found PID run, to its string's end: the edge-ring contrast and the excess over
    modules outside the string together, ``sum / sqrt(m)`` over the best ``m`` modules
    (``pid_tail_unexplained_z``, :func:`pvscan.diagnose.patterns.pid.unexplained_tail_evidence`), at
    most ``[validity] max_unexplained_pid_tail_z``.

    PID fades along a string from its negative end (common practice), and its last modules lose
    little enough to sit near the noise one by one: a run found only in part leaves this evidence
    behind, and the string's loss and extent are then not measured. Unknown (passes) when PID was
    not looked for.
    """
    m = int(evidence.get("pid_tail_unexplained_modules") or 1)
    return _unexplained_check(
        "unexplained_pid_tail", evidence, "pid_tail_unexplained", settings, "unexplained PID tail",
        "unknown (PID not looked for)", "no module past a PID run found carries the pattern on",
        "{m} module(s) from {module}, past a PID run found, show the edge-ring pattern and run warm at "
        "combined z {value:.1f}, but no finding takes them in", m=m)


def cold_run_check(evidence: Mapping[str, Any], settings: Mapping[str, Any] | None = None) -> Check:
    """``cold_run``: how far the coldest run of neighbouring modules along a table row sits below
    its references, in module-to-module spreads (``cold_run_z`` [robust SD], its warmest module;
    :func:`pvscan.diagnose.classify`), at most ``[validity] max_cold_run_z``.

    No fault of a module makes it run colder than its producing neighbours (every fault turns
    power into heat); neighbours far colder are an image artefact not levelled (a mosaic seam or a
    sky reflection running to a row's end) or levelled by too much, and the findings beside it (an
    open string under the same seam) are not measured. Unknown (passes) when the classification
    measured nothing.
    """
    lim = float(_validity_settings(settings)["max_cold_run_z"])
    value = _finite(evidence.get("cold_run_z"))
    mods = list(evidence.get("cold_run_modules") or [])
    dt = _finite(evidence.get("cold_run_k"))
    found = nothing = None
    if value is not None and mods and dt is not None:
        found = (f"{len(mods)} neighbouring modules of a table row ({mods[0]} .. {mods[-1]}) read at least "
                 f"{-dt:.2f} K below their references, {value:.1f} module spreads (at most {lim:g})")
    elif value is not None:
        nothing = f"no run of neighbouring modules reads below its references (at most {lim:g})"
    msg = _message("cold run", value, lim, "unknown (no modules measured)", nothing, found,
                   "no fault cools a module: an image artefact (a mosaic seam, a sky reflection) is not "
                   "levelled there, and the findings of that row (an open string under it) are not measured; "
                   "check the ortho there")
    c = _check("cold_run", value, lim, "max", "robust SD",
               "faults only warm a module (IEC TS 62446-3; pvscan.diagnose.classify; calibrated)", message=msg)
    c.update({"modules": mods, "delta_t_k": dt})
    return c


def evidence_checks(evidence: Mapping[str, Any], settings: Mapping[str, Any] | None = None) -> list[Check]:
    """The checks of what the classification measured about the flight as a whole
    (:attr:`pvscan.diagnose.results.Diagnosis.evidence`): ``string_reference``,
    ``module_spread``, ``row_cluster``, ``row_edge``, ``unexplained_pid``,
    ``unexplained_pid_pattern``, ``unexplained_pid_tail`` and ``cold_run``. Empty when there is no evidence (no
    module classified)."""
    if not evidence:
        return []
    checks = [string_reference_check(evidence, settings), module_spread_check(evidence, settings)]
    if "row_cluster_score" in evidence:
        checks.append(row_cluster_check(evidence, settings))
    if "row_edge_offset_k" in evidence:
        checks.append(row_edge_check(evidence, settings))
    if "pid_unexplained_z" in evidence:
        checks.append(unexplained_pid_check(evidence, settings))
    if "pid_pattern_unexplained_z" in evidence:
        checks.append(unexplained_pid_pattern_check(evidence, settings))
    if "pid_tail_unexplained_z" in evidence:
        checks.append(unexplained_pid_tail_check(evidence, settings))
    if "cold_run_z" in evidence:
        checks.append(cold_run_check(evidence, settings))
    return checks
