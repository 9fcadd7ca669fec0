"""``kktrace runs`` and ``kktrace replay``: what the store holds, a recorded iteration rebuilt."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from ._shared import (
    EXIT_OK,
    add_command,
    cell,
    emit_json,
    nonneg_int,
    num,
)

_RUNS_EXAMPLES = """examples:
  kktrace runs
  kktrace runs --status iteration_limit --json"""

_REPLAY_EXAMPLES = """examples:
  kktrace replay RUN_ID --iteration 100
  kktrace replay RUN_ID --iteration 0 --json
  kktrace replay PARENT_ID --pair release,rework --iteration 50"""


def cmd_runs(args: argparse.Namespace) -> int:
    import solver

    filters = {"status": args.status, "solver": args.solver, "kernel": args.kernel,
               "fingerprint": args.fingerprint}
    listing = solver.store_listing(store=args.store, **filters)
    rows = listing.rows
    if args.limit is not None:
        rows = rows[-args.limit:] if args.limit > 0 else []
    if args.json:
        emit_json([{**r, "record": "parent", "members": listing.parents[r["run_id"]]}
                   if r["run_id"] in listing.parents else r for r in rows], sys.stdout)
        return EXIT_OK
    if not rows:
        print("no runs match" if any(v is not None for v in filters.values())
              else "the store holds no runs yet")
        _print_leftovers(listing)
        return EXIT_OK
    cols = [c for c in ("run_id", "created", "solver", "status", "iterations", "n",
                        "kernel", "C", "max_violation", "duality_gap", "parent_id")
            if any(c in r for r in rows)]
    rows = _fold_parents(rows, listing.parents)
    table = [[cell(r.get(c)) for c in cols] for r in rows]
    widths = [max(len(c), *(len(t[i]) for t in table)) for i, c in enumerate(cols)]
    print("  ".join(c.ljust(w) for c, w in zip(cols, widths, strict=True)))
    for t in table:
        print("  ".join(v.ljust(w) for v, w in zip(t, widths, strict=True)))
    _print_leftovers(listing)
    return EXIT_OK


def _fold_parents(rows: list[dict[str, Any]], parents: dict[str, list[dict[str, Any]]]
                  ) -> list[dict[str, Any]]:
    """Parents (multi-class models) with their member runs folded under them: the
    parent's row says ``model of N pairs``, each member's id is indented and names its pair."""
    if not parents:
        return rows
    by_id = {r["run_id"]: r for r in rows}
    folded = {m["run_id"] for ms in parents.values() for m in ms}
    out = []
    for r in rows:
        if r["run_id"] in folded:
            continue
        if r["run_id"] not in parents:
            out.append(r)
            continue
        ms = parents[r["run_id"]]
        pairs = sum(m["role"] == "pair" for m in ms)
        below = f"{pairs} pairs below" if pairs else f"{len(ms)} member runs below"
        out.append({**r, "solver": "model" if pairs else "parent", "parent_id": below})
        for m in ms:
            sub = by_id.get(m["run_id"])
            if sub is None:
                continue
            key = " vs ".join(m.get("key") or [])
            what = {"pair": "pair", "pair_challenger": "challenger"}.get(m["role"], m["role"])
            out.append({**sub, "run_id": f"  {what} {key}: {sub['run_id']}",
                        "parent_id": sub.get("parent_id") or "-"})
    return out


def _print_leftovers(listing: Any) -> None:
    """Catalog state, temporary folders and runs missing their requested challenger."""
    if listing.catalog_note:
        print(f"note: {listing.catalog_note}")
    for t in listing.temp_folders:
        who = f"writer pid {t['pid']}" if t["pid"] else "writer unknown"
        state = ("still running (a save in progress)" if t["writer_running"] else
                 "no longer running: left by a killed writer; 'kktrace clean' removes it")
        print(f"leftover: temporary folder {t['folder']} ({who} {state})")
    for m in listing.missing_challengers:
        print(f"incomplete: SMO run {m['run_id']} was trained with --solver both, but its QP "
              "challenger run was never saved (the writer stopped between the two saves)")


def cmd_replay(args: argparse.Namespace) -> int:
    import solver

    state = solver.replay(args.run, args.iteration, store=args.store, pair=args.pair)
    cert = state.certificate.to_dict()
    d = {
        "run_id": state.run_id,
        "iteration": state.iteration,
        "base_iteration": state.base_iteration,
        "deltas_applied": state.deltas_applied,
        "certificate": cert,
        "recorded": dict(state.recorded) if state.recorded is not None else None,
        "run_status": state.run_status.label if state.run_status is not None else None,
        "run_converged": state.run_status == solver.Status.CONVERGED,
        "run_message": state.run_message,
        "run_timing": dict(state.run_timing or {}),
    }
    if args.json:
        d["alpha"] = state.alpha.tolist()
        emit_json(d, sys.stdout)
        return EXIT_OK
    who = args.run if not args.pair else (f"pair {' vs '.join(args.pair.split(','))} "
                                           f"(run {state.run_id}) of {args.run}")
    print(f"{'' if args.pair else 'run '}{who} rebuilt at iteration {state.iteration} "
          f"(snapshot {state.base_iteration} + {state.deltas_applied} recorded steps)")
    print(f"  run status    {d['run_status']} (of the whole run: {d['run_message']})")
    print(f"  run time      {solver.timing_text(d['run_timing'])}")
    _print_state(state, cert)
    return EXIT_OK


#: whose figures a trace row holds, by the owner named in solver.vocabulary
_ROW_OWNER = {"smo": "the SMO loop's own figures", "cvxopt": "cvxopt's own figures at its "
              "interior iterate, not the certificate's"}


def _print_state(state: Any, cert: dict[str, Any]) -> None:
    """The certificate at the replayed α, then the trace row in the solver's own words."""
    import solver

    t = solver.term
    print(f"  α             {state.alpha_source}")
    print(f"  certificate of α after iteration {state.iteration} (kktrace's shared "
          "certificate, gradient recomputed):")
    print(f"    {t('max_violation').label:30s} {num(cert['max_violation'])}  "
          f"(kkt_tol {num(cert['kkt_tol'])})")
    print(f"    {t('dual_objective').label:30s} {num(cert['dual_objective'])}")
    print(f"    {t('primal_objective').label:30s} {num(cert['primal_objective'])}")
    print(f"    {t('duality_gap').label:30s} {num(cert['duality_gap'])}  "
          f"({t('relative_gap').label} {num(cert['relative_gap'])})")
    print(f"    {'support vectors':30s} {cert['n_support']} ({cert['n_free']} "
          f"{t('n_free').label}, {cert['n_bounded']} {t('n_bounded').label})")
    print(f"    {t('bias').label:30s} {num(cert['bias'], '.10g')}")
    if not state.recorded:
        return
    terms = {k: solver.trace_term(state.solver, k) for k in state.recorded if k != "iteration"}
    owners = {tm.owner for tm in terms.values()}
    whose = "; ".join(_ROW_OWNER.get(o, f"{o}'s own figures") for o in sorted(owners))
    print(f"  trace row {state.iteration} ({whose}):")
    width = max(len(tm.label) for tm in terms.values())
    for k, tm in terms.items():
        v = state.recorded[k]
        print(f"    {tm.label:{width}s}  {num(v) if isinstance(v, float) else v}")


def _is_long_array(v: Any) -> bool:
    shape = getattr(v, "shape", None)
    return shape is not None and len(shape) >= 1 and shape[0] > 8



def register(sub: Any) -> None:
    """Add this module's commands to the sub-command table."""
    p = add_command(sub, "runs", "list the runs in the store", _RUNS_EXAMPLES)
    p.add_argument("--status", default=None, help="only runs with this status (e.g. converged)")
    p.add_argument("--solver", default=None, help="only runs of this solver (smo, qp)")
    p.add_argument("--kernel", default=None, help="only runs with this kernel")
    p.add_argument("--fingerprint", default=None, help="only runs on data with this fingerprint")
    p.add_argument("--limit", type=nonneg_int, default=None, help="show the newest N runs")
    p.set_defaults(func=cmd_runs)

    p = add_command(sub, "replay", "rebuild a run's state at a recorded iteration",
                    _REPLAY_EXAMPLES)
    p.add_argument("run", metavar="RUN_ID")
    p.add_argument("--iteration", type=nonneg_int, required=True, metavar="K",
                   help="iteration to rebuild (0 = start)")
    p.add_argument("--pair", metavar="A,B", default=None,
                   help="for a multi-class model: the pair run to rebuild (two class labels)")
    p.set_defaults(func=cmd_replay)

