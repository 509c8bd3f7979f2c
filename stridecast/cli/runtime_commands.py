"""Handlers of `inspect`, `advance` and `forecast`: runtime only (NumPy)."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

from stridecast import caution
from stridecast.runtime import Finding, load
from stridecast.runtime.findings import WARNING_KINDS

from .common import (
    WIDE_STATE,
    bundle_path,
    check_out,
    read_states,
    read_times,
    summary,
    write_atomically,
    write_states,
)
from .parsing import DeprecatedAlias, add_command, add_state_options


def register(subparsers) -> None:
    inspect = add_command(subparsers, "inspect", "Show a bundle's levels, operators and figures; "
                   "re-verify its checksums.", "stridecast inspect crane-demo.bundle",
                   "stridecast.cli.runtime_commands:inspect_command")
    inspect.add_argument("bundle", nargs="?", help="bundle directory")
    inspect.add_argument("--demo", action="store_true", help="the bundle shipped in the package")
    inspect.add_argument("--json", action="store_true", help="print JSON")

    advance = add_command(subparsers, "advance", "Forecast the state at one time.",
                   "stridecast advance crane-demo.bundle --state 3,-24,0,0 --time 12.5",
                   "stridecast.cli.runtime_commands:advance_command")
    advance.add_argument("bundle", nargs="?", help="bundle directory")
    advance.add_argument("--demo", action="store_true", help="the bundle shipped in the package")
    when = advance.add_mutually_exclusive_group(required=True)
    when.add_argument("--time", type=float, metavar="T",
                      help="time to reach, ≥ 0, in the bundle's time unit")
    when.add_argument("--t", type=float, dest="time", action=DeprecatedAlias,
                      new_name="--time")
    advance.add_argument("--out", metavar="FILE", help="write the answer to .npy (as returned) "
                         "or .csv (a row of names, one state per row) instead of printing it")
    add_state_options(advance)

    forecast = add_command(
        subparsers, "forecast", "Forecast the state at many times (dense output).",
                    "stridecast forecast crane-demo.bundle --state 3,-24,0,0 --until 60 "
                    "--every 0.5 --out forecast.csv",
                    "stridecast.cli.runtime_commands:forecast_command")
    forecast.add_argument("bundle", nargs="?", help="bundle directory")
    forecast.add_argument("--demo", action="store_true", help="the bundle shipped in the package")
    times = forecast.add_mutually_exclusive_group(required=True)
    times.add_argument("--times", metavar="T1,T2,...", help="comma-separated times")
    times.add_argument("--until", type=float, help="last time of an evenly spaced grid")
    forecast.add_argument("--every", type=float, help="spacing of the grid given by --until")
    forecast.add_argument("--out", metavar="FILE", help="write .csv or .npy instead of printing")
    add_state_options(forecast)



def inspect_command(arguments: argparse.Namespace) -> int:
    from stridecast.runtime.describe import describe_bundle

    description = describe_bundle(bundle_path(arguments))
    status = 0 if description["checksums_ok"] else 1
    if arguments.json:
        print(json.dumps(description, indent=2))
        return status
    manifest = description["manifest"]
    unit = manifest["time"]["unit"]
    base = manifest["time"]["base_step"]
    state = manifest["state"]
    print(f"bundle      {description['path']}")
    print(f"name        {manifest['name'] or '-'}  {manifest['description']}")
    names = [f"{n} [{u}]" if u else n for n, u in zip(state["names"], state["units"], strict=True)]
    if len(names) > WIDE_STATE:  # a field: the first and last few names
        names = [*names[:3], f"… {len(names) - 6} more …", *names[-3:]]
    print(f"state       {state['dim']} components: {', '.join(names)}")
    print(f"base step   {base:g} {unit}    update: {manifest['update']}")
    print("levels")
    print(f"  {'stride':>7} {'time':>12}  {'params':>8}  {'opset':>5}  checksum  operators")
    for level in description["levels"]:
        operators = ", ".join(f"{op}×{count}" for op, count in level["operators"].items())
        if level["checksum"] != "ok":
            print(f"  {level['stride']:>7} {level['stride_time']:>10g} {unit:<2} "
                  f"{'-':>8}  {'-':>5}  MISMATCH  {level['file']} was changed or corrupted "
                  f"(sha256 {level['actual_sha256'][:12]}…, manifest {level['sha256'][:12]}…)")
            continue
        print(f"  {level['stride']:>7} {level['stride_time']:>10g} {unit:<2} "
              f"{level['parameters']:>8}  {level['opset']:>5}  {level['checksum']:<8}  {operators}")
    for item in description["files"]:
        print(f"  {item['what']}: checksum {item['checksum']}"
              + (f" ({item['error']})" if item["error"] else ""))
    _print_reduction(description.get("reduction"))
    envelope = manifest.get("envelope")
    if envelope:
        reduction = manifest.get("reduction")
        print("envelope" + ("    (latent states)" if reduction else ""))
        box_names = (state["names"] if not reduction
                     else [f"latent[{i}]" for i in range(reduction["latent_dim"])])
        for name, low, high in zip(box_names, envelope["min"], envelope["max"], strict=True):
            print(f"  {name:<12} [{low:.6g}, {high:.6g}]")
        samples = envelope.get("samples")
        if samples:
            print(f"  samples      {samples['count']} training states ({samples['file']}); far "
                  f"from the data beyond {samples['radius']:.4g} (normalised units)")
        else:
            print("  samples      not recorded (the min/max box only)")
    else:
        print("envelope    not recorded")
    horizon = manifest.get("validated_horizon")
    print(f"validated   {'not recorded' if horizon is None else f'{horizon:g} {unit}'}")
    _print_validation(manifest.get("validation"), unit)
    _print_report(description.get("report"), description["plots"], unit)
    if status:
        bad = [level["file"] for level in description["levels"] if level["checksum"] != "ok"]
        bad += [item["what"] for item in description["files"] if item["checksum"] != "ok"]
        print(f"error: the checksums of {', '.join(bad)} do not match the manifest; `load` will "
              "refuse this bundle.", file=sys.stderr)
        return status
    print(caution.CAUTION, file=sys.stderr)
    return 0


def _print_reduction(reduction: dict | None) -> None:
    """A reduced bundle's encoder and decoder: latent dimension, form, files, checksums."""
    if not reduction:
        return
    threshold = reduction["reconstruction_threshold"]
    print(f"reduction   latent dimension {reduction['latent_dim']}; reconstruction check "
          + ("not recorded" if threshold is None else
             f"above {threshold:.4g} (normalised RMS of x − decoder(encoder(x)))"))
    for side in ("encoder", "decoder"):
        item = reduction[side]
        form = item["form"] or "-"
        size = "" if item["parameters"] is None else f", {item['parameters']} parameters"
        print(f"  {side:<8} {form}{size}  {item['file']}  sha256 {item['sha256'][:12]}…  "
              f"checksum {item['checksum']}")


def _print_report(report: dict | None, plots: list[str], unit: str) -> None:
    """A readable summary of report.json (the full document: `inspect --json`)."""
    print(f"plots       {', '.join(plots) if plots else 'none in the bundle'}")
    if not report:
        print("report      none (report.json is optional)")
        return
    print("report      report.json (full content: stridecast inspect --json)")
    verification = report.get("verification") or {}
    if verification:
        passed = {True: "passed", False: "FAILED"}.get(verification.get("passed"), "?")
        print(f"  export verification  {passed} on {verification.get('samples', '?')} states")
    validation = report.get("validation") or {}
    if validation:
        kept, trained = validation.get("strides"), validation.get("trained_strides")
        if kept is not None:
            print(f"  levels kept          {kept}"
                  + (f" of {trained}" if trained and trained != kept else ""))
        summary = validation.get("summary") or {}
        if summary.get("why"):
            print(f"  why                  {summary['why']}")
        at = validation.get("at_validated_horizon") or {}
        horizon = validation.get("validated_horizon")
        if horizon is not None:
            estimate, bound = at.get("estimate"), at.get("upper_bound")
            figures = "" if estimate is None else (
                f": held-out error {estimate:.3g}, 95 % bound {bound:.3g}" if bound is not None
                else f": held-out error {estimate:.3g}")
            print(f"  validated horizon    {horizon:g} {unit}{figures}")
    training = report.get("training") or {}
    history = training.get("history") or {}
    if history:
        seconds = sum(float(entry.get("seconds") or 0) for entry in history.values())
        print(f"  training             {len(history)} levels, {seconds:.0f} s")
    others = [key for key in report if key not in ("verification", "validation", "training",
                                                    "plots")]
    if others:
        print(f"  also                 {', '.join(others)}")


def _print_validation(validation: dict | None, unit: str, points: int = 6) -> None:
    """The held-out error curve: metric, tolerance and a few points spread over it."""
    if not validation:
        print("validation  no held-out error curve recorded")
        return
    times, errors = validation["times"], validation["errors"]
    print(f"validation  {validation['metric']} held-out error, tolerance "
          f"{validation['tolerance']:g}; {len(times)} curve points")
    shown = sorted({round(i * (len(times) - 1) / max(points - 1, 1))
                    for i in range(min(points, len(times)))})
    for index in shown:
        error = errors[index]
        text = "diverged" if error is None else f"{error:.4g}"
        print(f"  t = {times[index]:<10g} {unit:<3} error {text}")


def _warnings(findings: tuple[Finding, ...]) -> list[str]:
    """The messages of the findings that make an answer an extrapolation."""
    return [finding.message for finding in findings if finding.kind in WARNING_KINDS]


def _error_or_none(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def _error_text(value: float) -> str:
    if np.isnan(value):
        return "not recorded"
    return "unbounded" if np.isinf(value) else f"{value:.3g}"


def _print_findings(findings: tuple[Finding, ...]) -> None:
    for finding in findings:
        label = "warning" if finding.kind in WARNING_KINDS else "note"
        print(f"{label}: {finding.message}", file=sys.stderr)


def _print_caution_once(arguments: argparse.Namespace) -> None:
    """The caution after a successful answer: once per session, on demand, never with JSON
    (a script reading the answer has no reader for it; errors never reach here)."""
    if arguments.json:
        return
    if arguments.caution or caution.due():
        print(caution.CAUTION, file=sys.stderr)
        caution.remember_shown()


def advance_command(arguments: argparse.Namespace) -> int:
    # Findings come back with the plan (every visited state and the time checked); the CLI
    # prints them itself rather than through Python warnings.
    out = None if arguments.out is None else check_out(arguments.out)
    stepper = load(bundle_path(arguments), dtype=arguments.dtype, on_extrapolation="ignore")
    states = read_states(arguments, stepper.state_dim)
    result, plan = stepper.advance_with_plan(states, arguments.time, off_grid=arguments.off_grid)
    if out is not None:
        write_states(out, result, stepper.state_names)
    if arguments.json:
        print(json.dumps({"t": arguments.time, "state": result.tolist(),
                          "state_names": list(stepper.state_names), "plan": plan.to_dict(),
                          "expected_error": _error_or_none(plan.expected_error),
                          "findings": [finding.to_dict() for finding in plan.findings],
                          "warnings": _warnings(plan.findings)}))
    else:
        steps = " + ".join(f"{count}×{stride}" for stride, count in plan.steps) or "none"
        print(f"t = {arguments.time:g} {stepper.manifest.time_unit}  (method {plan.method}; "
              f"steps {steps}; {plan.evaluations} network "
              f"evaluation{'' if plan.evaluations == 1 else 's'})")
        rows = result.reshape(-1, stepper.state_dim)
        if out is not None:
            print(f"wrote {len(rows)} state{'' if len(rows) == 1 else 's'} of "
                  f"{stepper.state_dim} components to {out}")
        elif stepper.state_dim > WIDE_STATE:
            _print_summaries(rows, stepper.state_dim)
        else:
            print("  ".join(f"{name:>14}" for name in stepper.state_names))
            for row in rows:
                print("  ".join(f"{value:>14.7g}" for value in row))
        print(f"expected error {_error_text(plan.expected_error)} (held-out normalised RMS at "
              "this time)")
    _print_findings(plan.findings)
    _print_caution_once(arguments)
    return 0


def forecast_command(arguments: argparse.Namespace) -> int:
    out = None if arguments.out is None else check_out(arguments.out)
    stepper = load(bundle_path(arguments), dtype=arguments.dtype, on_extrapolation="ignore")
    states = read_states(arguments, stepper.state_dim)
    times = read_times(arguments)
    result, info = stepper.forecast_with_info(states, times, off_grid=arguments.off_grid)
    # One table for one state or a batch: a row per (time, member), members numbered from 0.
    members = 1 if states.ndim == 1 else states.shape[0]
    rows = result.reshape(len(times) * members, stepper.state_dim)
    row_times = np.repeat(times, members)
    row_members = np.tile(np.arange(members), len(times))
    row_errors = np.repeat(info.expected_error, members)
    batch = states.ndim != 1
    if out is not None:
        _write_table(out, row_times, rows, stepper.state_names,
                     row_members if batch else None)
        print(f"wrote {len(rows)} states to {arguments.out} ({info.evaluations} network "
              f"evaluation{'' if info.evaluations == 1 else 's'} in {info.network_calls} "
              f"batched call{'' if info.network_calls == 1 else 's'})")
        if np.isfinite(info.expected_error).any() or np.isinf(info.expected_error).any():
            print(f"expected error {_error_text(float(info.expected_error.max()))} at most "
                  "(held-out normalised RMS)")
    elif arguments.json:
        print(json.dumps({"times": times.tolist(), "states": result.tolist(),
                          "state_names": list(stepper.state_names),
                          "evaluations": info.evaluations,
                          "expected_error": [_error_or_none(v) for v in info.expected_error],
                          "findings": [finding.to_dict() for finding in info.findings],
                          "warnings": _warnings(info.findings)}))
    elif stepper.state_dim > WIDE_STATE:
        member_header = f"  {'member':>6}" if batch else ""
        print(f"{'t':>10}{member_header}  state ({stepper.state_dim} components)")
        for t, member, row in zip(row_times, row_members, rows, strict=True):
            print(f"{t:>10.6g}" + (f"  {member:>6}" if batch else "") + f"  {summary(row)}")
        print(f"(states of {stepper.state_dim} components are summarised; use --out FILE "
              "(.csv or .npy) or --json for the values)")
        if not np.isnan(info.expected_error).all():
            print(f"expected error {_error_text(float(info.expected_error.max()))} at most "
                  "(held-out normalised RMS)")
    else:
        known = not np.isnan(info.expected_error).all()
        error_header = f"  {'exp. error':>10}" if known else ""
        member_header = f"  {'member':>6}" if batch else ""
        print(f"{'t':>10}{member_header}  "
              + "  ".join(f"{name:>14}" for name in stepper.state_names) + error_header)
        for t, member, row, error in zip(row_times, row_members, rows, row_errors,
                                         strict=True):
            error_cell = f"  {_error_text(error):>10}" if known else ""
            member_cell = f"  {member:>6}" if batch else ""
            print(f"{t:>10.6g}{member_cell}  " + "  ".join(f"{value:>14.7g}" for value in row)
                  + error_cell)
    _print_findings(info.findings)
    _print_caution_once(arguments)
    return 0


def _print_summaries(rows: np.ndarray, dim: int) -> None:
    """A wide answer without --out/--json: one line per state instead of d columns."""
    for index, row in enumerate(rows):
        label = "state" if len(rows) == 1 else f"state {index}"
        print(f"{label}: {dim} components, {summary(row)}")
    print("(use --out FILE (.csv or .npy) or --json for the values)")


def _write_table(path: Path, times: np.ndarray, states: np.ndarray, names,
                 members: np.ndarray | None = None) -> None:
    """`forecast --out`, written atomically. Columns: t, then `member` for a batch, then the
    state components."""
    columns = [times] if members is None else [times, members]
    table = np.column_stack([*columns, states])

    def write(handle):
        if path.suffix == ".npy":
            np.save(handle, table)
        else:
            header = ",".join(["t", *(["member"] if members is not None else []), *names])
            np.savetxt(handle, table, delimiter=",", header=header, comments="", fmt="%.9g")

    write_atomically(path, write)
