"""``lotgate trend`` and ``lotgate rebaseline``: a chart for a reviewer, and an audited re-baseline.

Each command function takes the parsed arguments and returns the exit code: 0 done, 2 refused
or not possible, 4 an unknown product or attribute (one line on standard error saying why).
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
import unicodedata
from pathlib import Path
from typing import Any

from flows.person_identity import add_identity_arguments
from pipeline.errors import InputError, LotgateError, NotFound, SpecificationError
from pipeline.science.process_capability import Interval

DEFAULT_WINDOW = 30


# ------------------------------------------------------------------------------ shared
EXIT_SETUP, EXIT_NOT_FOUND = 2, 4  # as documented in flows.cli


def _refuse(command: str, exc: Exception) -> int:
    text = " ".join(str(exc).split())
    print(f"lotgate {command}: {text}", file=sys.stderr)
    return EXIT_NOT_FOUND if isinstance(exc, NotFound) else EXIT_SETUP



def _attribute(product: str, code: str, workspace: str) -> Any:
    """The trended attribute of a product's specification; NotFound naming the choices for an unknown one."""
    from pipeline.records.controlled_files import controlled_folders, load_catalog
    from pipeline.records.workspace import open_workspace

    catalog = load_catalog(controlled_folders(open_workspace(Path(workspace).expanduser())))
    method = catalog.methods.get(product)
    if method is not None and hasattr(method, "recovery_attribute"):
        if code != "reference_recovery":
            raise NotFound(f"method {product} charts only 'reference_recovery' (its reference standard)")
        from types import SimpleNamespace

        return SimpleNamespace(product_name=method.title), method.recovery_attribute()
    spec = catalog.specifications.get(product)
    if spec is None:
        raise NotFound(f"unknown product '{product}'; known products: "
                                 f"{', '.join(sorted(catalog.specifications))}; or a kinetic method with "
                                 "'reference_recovery'")
    trended = [a.code for a in spec.attributes if a.trend]
    if code not in {a.code for a in spec.attributes}:
        raise NotFound(f"product {product} has no attribute '{code}'; its charted attributes: "
                                 f"{', '.join(trended) or 'none'}")
    attribute = spec.attribute(code)
    if not attribute.trend:
        raise SpecificationError(f"{product} {code} is not on a control chart (no 'trend: true' in "
                                 f"specification v{spec.document.version}); charted: {', '.join(trended) or 'none'}")
    return spec, attribute


def _num(value: float | None, decimals: int) -> str:
    return "—" if value is None else f"{value:.{max(decimals, 0)}f}"


def _pad(text: str, width: int) -> str:
    """Left-justify to ``width`` columns; combining marks (the bar of MR̄) take no column."""
    shown = sum(1 for ch in text if not unicodedata.combining(ch))
    return text + " " * max(width - shown, 0)


def _lots_text(lots: tuple[str, ...] | list[str]) -> str:
    if not lots:
        return "none"
    return lots[0] if len(lots) == 1 else f"{lots[0]} … {lots[-1]}"


# ------------------------------------------------------------------------------ trend
def chart_report(view: Any, product_name: str) -> str:
    """The chart's numbers as text: limits, the lots of the window, capability, signals."""
    d = view.digits + 1
    unit = view.unit
    lines = [f"{view.product_code} {product_name} · {view.title} ({view.attribute}, {unit}) — I-MR chart",
             f"Specification: {_limit_text(view)}; Nelson rules {', '.join(map(str, view.rules))}; "
             f"baseline {view.baseline_n} released lots"]
    lim = view.limits
    if lim is None:
        lines.append(f"Control limits: {view.status}")
    else:
        lines += [
            f"Control limits: version {lim.version} (active), frozen {_when(lim.frozen_at_utc)} by {lim.frozen_by}",
            f"  reason          {lim.reason}",
            f"  baseline lots   {len(lim.baseline_lots)}: {_lots_text(lim.baseline_lots)}",
            f"  centre          {_num(lim.center, d + 1)} {unit}",
            f"  sigma           {_num(lim.sigma, d + 1)} {unit}  (σ̂ = MR̄/d₂, d₂ = 1.128)",
            f"  UCL / LCL       {_num(lim.ucl, d + 1)} / {_num(lim.lcl, d + 1)} {unit}  (centre ± 3σ̂)",
            f"  MR̄ / MR UCL     {_num(lim.mr_bar, d + 1)} / {_num(lim.mr_ucl, d + 1)} {unit}  (D₄ = 3.267)"]
        if view.previous is not None:
            lines.append(f"  replaces        version {view.previous.version} (centre "
                         f"{_num(view.previous.center, d + 1)}, σ {_num(view.previous.sigma, d + 1)})")
    released = sum(r.released for r in view.rows)
    lines += ["", f"Last {len(view.rows)} lots ({released} released, {len(view.rows) - released} held); "
                  f"released lots on the chart in all: {view.released_total}"]
    header = f"  {'lot':<16}{'value':>12}  {'disposition':<34}{'zone':<13}signals"
    lines += [header, "  " + "-" * (len(header) + 10)]
    for r in view.rows:
        tag = " (baseline)" if r.baseline else ""
        lines.append(f"  {r.lot_id:<16}{_num(r.value, d):>12}  {(r.disposition + tag):<34}"
                     f"{r.zone_text:<13}{'; '.join(r.signal_notes)}")
    lines.append("")
    cap = view.capability
    if cap is None:
        lines.append(f"Capability: {view.capability_note}")
    else:
        lines += [f"Capability against {_limit_text(view)}, {view.capability_note}:",
                  f"  Cpk {cap.cpk:.2f}{_ci(cap.cpk_interval, cap.confidence)}  "
                  f"(σ within = MR̄/d₂ = {_num(cap.sigma_within, d + 1)} {unit})",
                  f"  Ppk {cap.ppk:.2f}{_ci(cap.ppk_interval, cap.confidence)}  "
                  f"(σ overall = s = {_num(cap.sigma_overall, d + 1)} {unit}); mean {_num(cap.mean, d + 1)} {unit}",
                  "  (intervals: Bissell 1990 approximation; a capability index is no substitute for the "
                  "plant's own capability study)"]
    if lim is not None:
        lines.append("")
        if view.signals:
            lines.append("Signals in the window:")
            for s in view.signals:
                where = ("found when the lot was decided; the lot is held" if s.source == "decision"
                         else "on the released series, against the active limits")
                lines.append(f"  {s.lot_id}: {s.description} ({where})")
                if s.detail:
                    lines.append(f"      recorded: {s.detail}")
        else:
            lines.append("Signals in the window: none")
    return "\n".join(line.rstrip() for line in lines)


def _when(iso: str) -> str:
    """'2026-12-01T17:46:45+00:00' → '2026-12-01 17:46 UTC'."""
    try:
        return dt.datetime.fromisoformat(iso).astimezone(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    except ValueError:
        return iso


def _ci(interval: Interval | None, confidence: float) -> str:
    """', 95 % CI 0.88–1.78' beside a capability index."""
    return "" if interval is None else f", {confidence:.0%} CI {interval.low:.2f}–{interval.high:.2f}"


def _limit_text(view: Any) -> str:
    fmt = f"{{:.{view.digits}f}}"
    if view.lsl is not None and view.usl is not None:
        return f"{fmt.format(view.lsl)} – {fmt.format(view.usl)} {view.unit}"
    if view.lsl is not None:
        return f"≥ {fmt.format(view.lsl)} {view.unit}"
    if view.usl is not None:
        return f"≤ {fmt.format(view.usl)} {view.unit}"
    return "no limits (reported only)"


def cmd_trend(args: argparse.Namespace) -> int:
    """Print a chart's numbers and write its PNG and PDF."""
    from pipeline.documents.trend_figure import figure_pdf, figure_png
    from pipeline.night.open import open_records
    from pipeline.records.chart_queries import chart_history
    from pipeline.records.workspace import atomic_write
    from pipeline.release.chart_view import build_chart_view

    try:
        if args.window < 1:
            raise InputError(f"--window must be at least 1 lot, received {args.window}")
        spec, attribute = _attribute(args.product, args.attribute, args.workspace)
        ws, store = open_records(Path(args.workspace))
        view = build_chart_view(chart_history(store, args.product, args.attribute, args.window),
                                attribute, args.window)
        out = Path(args.out).expanduser() if args.out else ws.root / "charts"
        as_of = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
        stem = f"{args.product}_{args.attribute}_trend"
        png, pdf = out / f"{stem}.png", out / f"{stem}.pdf"
        atomic_write(png, figure_png(view, as_of))
        atomic_write(pdf, figure_pdf(view, as_of))
    except (LotgateError, OSError) as exc:
        return _refuse("trend", exc)
    print(chart_report(view, spec.product_name))
    print(f"\nChart written: {png}\n               {pdf}")
    return 0


# ------------------------------------------------------------------------------ rebaseline
def _side_by_side(old: Any, new: Any, d: int, unit: str) -> str:
    """Old and new limits in two columns."""
    def column(lim: Any) -> list[str]:
        if lim is None:
            return ["—"] * 9
        return [f"v{lim.version}", _num(lim.center, d), _num(lim.sigma, d), _num(lim.ucl, d),
                _num(lim.lcl, d), _num(lim.mr_bar, d), _num(lim.mr_ucl, d), str(len(lim.baseline_lots)),
                _lots_text(lim.baseline_lots)]
    names = ["version", f"centre ({unit})", "σ̂ = MR̄/d₂", "UCL", "LCL", "MR̄", "MR UCL", "baseline lots",
             "baseline"]
    left, right = column(old), column(new)
    width = max(14, *(len(x) for x in left)) + 3
    rows = [f"  {_pad('', 16)}{_pad('before', width)}after",
            *(f"  {_pad(n, 16)}{_pad(a, width)}{b}" for n, a, b in zip(names, left, right, strict=True))]
    return "\n".join(rows)


def cmd_rebaseline(args: argparse.Namespace) -> int:
    """Compute new limits from chosen released lots, store them as a new version, log it, print both."""
    from flows.person_identity import load_person_identity
    from pipeline.night.open import open_records
    from pipeline.night.rebaseline import rebaseline

    try:
        _, attribute = _attribute(args.product, args.attribute, args.workspace)
        ws, store = open_records(Path(args.workspace))
        if not args.identity:
            raise InputError("a re-baseline is signed by the person who decides it: give your PKCS#12 (--identity "
                             "P12) and its passphrase; a typed name is not accepted")
        identity = load_person_identity(args)
        done = rebaseline(ws, store, args.product, attribute, identity=identity, reason=args.reason,
                          from_lot=args.from_lot, count=args.count)
    except (LotgateError, OSError) as exc:
        return _refuse("rebaseline", exc)
    d = attribute.digits + 2
    new = done.after
    print(f"{args.product} {attribute.title} ({args.attribute}): control limits re-baselined "
          f"by {new.frozen_by}, version {new.version}")
    print(f"  reason: {new.reason}")
    print(f"  from {len(done.baseline_lots)} released lots {_lots_text(done.baseline_lots)} "
          f"(of {done.released_total} on the chart)")
    if len(done.baseline_lots) < attribute.baseline_n:
        print(f"  note: fewer lots than the specification's baseline of {attribute.baseline_n}")
    print(_side_by_side(done.before, new, d, attribute.unit))
    print(f"Recorded in the store's audit trail and in {ws.log} (kind limits-rebaselined); "
          f"the next night judges lots against version {new.version}.")
    return 0


# ------------------------------------------------------------------------------ parser
def add_commands(subparsers: Any) -> None:
    """Register ``trend`` and ``rebaseline`` on an ``argparse`` sub-parser collection."""
    trend = subparsers.add_parser(
        "trend", help="print a control chart's numbers and write it as PNG and PDF",
        description="Print one product attribute's I-MR chart: the limits in force (version, centre, "
                    "sigma = MR-bar/d2, UCL/LCL, MR-bar and MR UCL, baseline lots, when, by whom and why "
                    "frozen), the last N lots with value, disposition, zone and signals, and Cpk/Ppk over "
                    "them against the specification; write the chart (individuals and moving range, held "
                    "lots in their own colours, signals marked) as PNG and PDF.")
    trend.add_argument("product", metavar="PRODUCT", help="product code, e.g. LLC-200")
    trend.add_argument("attribute", metavar="ATTRIBUTE", help="charted attribute code, e.g. specific_activity")
    trend.add_argument("--workspace", required=True, metavar="DIR", help="workspace folder holding the store")
    trend.add_argument("--window", type=int, default=DEFAULT_WINDOW, metavar="N",
                       help=f"how many of the most recent lots to show (default {DEFAULT_WINDOW})")
    trend.add_argument("--out", metavar="DIR", help="folder for the PNG and PDF (default DIR/charts)")
    trend.set_defaults(func=cmd_trend)

    rebase = subparsers.add_parser(
        "rebaseline", help="re-compute a chart's control limits from chosen lots (audited)",
        description="Compute new I-MR limits from N consecutive released lots starting at LOT (default: "
                    "the last N, N = the specification's baseline size), store them as a new version "
                    "(the old one is kept, inactive) and record who did it and why in the decision log, signed "
                    "with the person's own identity. Refused without a reason that says something, or when the "
                    "identity does not hold the role 're-baseline' in the register of authorised signers.")
    rebase.add_argument("product", metavar="PRODUCT", help="product code, e.g. LLC-200")
    rebase.add_argument("attribute", metavar="ATTRIBUTE", help="charted attribute code, e.g. specific_activity")
    rebase.add_argument("--workspace", required=True, metavar="DIR", help="workspace folder holding the store")
    rebase.add_argument("--reason", metavar="TEXT",
                        help="why the limits change, e.g. the change control that moved the process (required)")
    add_identity_arguments(rebase, required=False,  # refused with its own message when missing
                           identity_help="your PKCS#12 signing identity (required; you must hold the role 're-baseline')")
    rebase.add_argument("--from-lot", dest="from_lot", metavar="LOT",
                        help="first released lot of the new baseline (default: the last N released lots)")
    rebase.add_argument("--count", type=int, metavar="N",
                        help="number of released lots in the new baseline (default: the specification's baseline size)")
    rebase.set_defaults(func=cmd_rebaseline)
