"""``kktrace keys`` and ``kktrace clean``: signing keys, and the leftovers of killed writers."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from ._shared import EXIT_OK, add_command, common_options, emit_json

_KEYS_EXAMPLES = """examples:
  kktrace keys new qa-lead --dir keys
  kktrace train batches.csv --label lab_decision --sign keys/qa-lead.private.pem
  kktrace verify RUN_ID --trusted keys/qa-lead.public.pem

Keep NAME.private.pem where only the signer can read it (it is written with mode 0600);
give NAME.public.pem to whoever checks the runs."""

_CLEAN_EXAMPLES = """examples:
  kktrace clean
  kktrace clean --store audit-traces --json

Removes only .tmp-* folders whose writing process no longer runs on this machine; runs,
the catalog and the audit log are never touched."""


def cmd_keys(args: argparse.Namespace) -> int:
    import solver

    priv, pub = solver.new_signing_keys(args.name, args.dir)
    if args.json:
        emit_json({"name": args.name, "private_key": str(priv), "public_key": str(pub)},
                  sys.stdout)
    else:
        print(f"Ed25519 key pair {args.name!r} written:")
        print(f"  private  {priv}  (mode 0600: sign with train --sign)")
        print(f"  public   {pub}  (check with verify --trusted)")
    return EXIT_OK


def cmd_clean(args: argparse.Namespace) -> int:
    import solver

    removed = solver.clean_store(store=args.store)
    listing = solver.store_listing(store=args.store)
    if args.json:
        emit_json({"removed": removed, "temp_folders": listing.temp_folders,
                   "missing_challengers": listing.missing_challengers}, sys.stdout)
        return EXIT_OK
    if not removed:
        print("no temporary folder of a stopped writer to remove")
    for name in removed:
        print(f"removed {name} (its writer no longer runs)")
    for t in listing.temp_folders:
        print(f"kept {t['folder']}: its writer (pid {t['pid']}) is still running")
    for m in listing.missing_challengers:
        print(f"note: SMO run {m['run_id']} lacks its requested QP challenger; re-train with "
              "--solver both to make the pair (runs are never removed)")
    return EXIT_OK


def register(sub: Any) -> None:
    """Add this module's commands to the sub-command table."""
    p = add_command(sub, "keys", "make an Ed25519 key pair for signing runs", _KEYS_EXAMPLES,
                    parents=[common_options(store=False)])
    p.add_argument("action", choices=("new",), help="new: write a key pair")
    p.add_argument("name", metavar="NAME", help="signer name (the files are NAME.*.pem)")
    p.add_argument("--dir", metavar="DIR", default=".",
                   help="folder for the two key files (default: the current folder)")
    p.set_defaults(func=cmd_keys)

    p = add_command(sub, "clean", "remove temporary folders left by killed writers",
                    _CLEAN_EXAMPLES)
    p.set_defaults(func=cmd_clean)
