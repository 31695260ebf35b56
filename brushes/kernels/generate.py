"""Every generated kernel file, proved and compared (``--check``) or rewritten (``--write``).

``python -m brushes.kernels.generate --check`` is what CI runs. It calls, in order:

- `derive` (the static regularized Kelvinlets, file `_generated.py`),
- `dynamic_derive` (the elastodynamic ones, file `_dynamic_generated.py`),
- `flow_derive` (the fused RK4 flow kernels, file `_flow_generated.py`).

Each generator imports the static derivation it builds on; none imports this module, so the
derivations stay free of import loops. Each also runs alone (``python -m brushes.kernels.derive
--check`` and so on).
"""
from __future__ import annotations

import argparse
import sys


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m brushes.kernels.generate",
                                     description="Prove and check (or write) every generated kernel file.")
    group = parser.add_mutually_exclusive_group(required=True)
    group.add_argument("--check", action="store_true", help="re-derive and prove; fail if any generated file differs")
    group.add_argument("--write", action="store_true", help="re-derive, prove and rewrite every generated file")
    args = parser.parse_args(argv)
    flag = "--write" if args.write else "--check"

    from brushes.kernels import derive, dynamic_derive, flow_derive

    ok = derive.main([flag]) == 0
    ok = dynamic_derive.check_or_write(write=args.write) and ok
    ok = flow_derive.main([flag]) == 0 and ok
    print(f"generate: {'every generated file is proved and current' if ok else 'FAILED'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
