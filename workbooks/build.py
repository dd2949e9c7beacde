"""Write the example workbooks into this folder (or check that the committed ones are current).

    python workbooks/build.py            # rebuild every example workbook here
    python workbooks/build.py --check    # exit 1 if a committed workbook differs from a fresh build
    python workbooks/build.py cat_tower  # rebuild only the named examples

The workbooks are built by :mod:`layerwise.addin.examples` from invented data
(:mod:`layerwise.addin.demo_data`); the installed package builds the same ones
for ``layerwise demo``. Files are compared by content (formulas, values, number
formats, merged ranges), not by bytes: openpyxl stamps the time of saving.
"""
from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

from layerwise.addin import examples

HERE = Path(__file__).resolve().parent


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("names", nargs="*", help=f"examples to build (default: all): {', '.join(examples.EXAMPLES)}")
    p.add_argument("--check", action="store_true", help="compare fresh builds with the files here; write nothing")
    args = p.parse_args(argv)
    names = args.names or list(examples.EXAMPLES)
    unknown = [n for n in names if n not in examples.EXAMPLES]
    if unknown:
        p.error(f"unknown example {unknown[0]!r}; examples are {', '.join(examples.EXAMPLES)}")
    if not args.check:
        for path in examples.build_examples(HERE, names):
            print(f"wrote {path.relative_to(HERE.parent)}")
        return 0
    stale = 0
    with tempfile.TemporaryDirectory() as tmp:
        for name, fresh in zip(names, examples.build_examples(tmp, names)):
            committed = HERE / fresh.name
            if not committed.exists():
                print(f"{committed.name}: missing")
                stale += 1
                continue
            diffs = examples.compare_contents(committed, fresh)
            if diffs:
                stale += 1
                print(f"{committed.name}: differs from a fresh build")
                for d in diffs:
                    print(f"  {d}")
            else:
                print(f"{committed.name}: current")
    return 1 if stale else 0


if __name__ == "__main__":
    sys.exit(main())
