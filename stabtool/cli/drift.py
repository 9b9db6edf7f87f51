"""'stabtool drift INPUTS... --out DIR': drift and jumps across repeated sweeps.

INPUTS are repeated sweeps of the same two gates (files, folders or globs,
or one NetCDF file holding the sweeps along an extra dimension);
maps of another window, shape or gate pair in the same folder (a survey, a
zoom) are left out and named, the largest series of repeats is measured.
They are put in time order (the sweeps' time attribute, else the file
names), each is registered to the first by phase correlation in volts, and
the pattern offset versus time is written to DIR as 'drift.csv',
'drift.json' and 'drift.png', with the sudden jumps, the slow drift rate
and a quality verdict.

Exit codes: 0 the drift was measured (check the verdict), 2 bad input.
"""

from __future__ import annotations

import argparse
import json
import tempfile
from dataclasses import replace
from pathlib import Path
from typing import Any

from ._options import add_load_options, load_options

__all__ = ["register", "run"]


def run(args: argparse.Namespace) -> int:
    """Measure the drift; print the verdict; return 0 (or 2 via InputError)."""
    from ..batch.drift import measure_drift
    from ..batch.inputs import check_output_folder, discover_inputs

    out = check_output_folder(args.out, args.inputs)
    opts = load_options(args)
    paths = [str(p) for p in discover_inputs(args.inputs, exclude=[out], load_options=opts)]
    with tempfile.TemporaryDirectory(prefix="stabtool-drift-") as features:
        items, left_out = _one_series(paths, features, opts)
        res = measure_drift(items, upsample=args.upsample, jump_threshold=args.jump_threshold, load_options=opts)
    if left_out:
        names = ", ".join(Path(p).name for p in left_out)
        res = replace(res, quality=res.quality.with_warning(
            f"{len(left_out)} map(s) of another window, shape or gate pair left out (not repeats of this "
            f"series): {names}", doubtful=False))
    written = res.write_outputs(out)
    if args.json:
        print(json.dumps(res.to_json(), indent=1))
    elif not args.quiet:
        print(f"{len(res.files)} sweeps of {res.x_gate}/{res.y_gate}: {res.verdict()}")
        if left_out:
            print(f"left out (another window, shape or gate pair): {', '.join(Path(p).name for p in left_out)}")
        last_x, last_y = 1e3 * res.offset_x_V[-1], 1e3 * res.offset_y_V[-1]
        print(f"last sweep offset: ({last_x:+.3f}, {last_y:+.3f}) mV; "
              f"written {', '.join(str(p) for p in written.values())}")
    return 0


def _one_series(paths: list[str], feature_dir: str, opts: dict[str, str]) -> tuple[list[Any], list[str]]:
    """The largest series of repeated sweeps among ``paths`` and the maps left out of it.

    A night's folder often holds a survey and a zoom beside the repeats; registering
    those to the repeats gives offsets of whole cells, not drift. The series are found
    as the batch finds them (same gates, shape and device, windows overlapping by 70 %).
    All maps are kept when a file cannot be read (the drift reports it) or when no two
    maps form a series. Each file is read once: the series' items carry the drift
    features saved under ``feature_dir``.
    """
    from ..batch.summary import series_of_files

    series, items = series_of_files(paths, feature_dir, load_options=opts)
    if not series:
        return [items[p] for p in paths], []
    best = max(series, key=len)  # (ties: the earliest series)
    keep = set(best)
    return [items[p] for p in paths if p in keep], [p for p in paths if p not in keep]


def register(subparsers: Any) -> None:
    """Add the ``drift`` sub-command."""
    p = subparsers.add_parser(
        "drift",
        help="pattern drift and jumps across repeated sweeps of the same gates",
        description=__doc__.split("\n\n")[1] if __doc__ else None,
        epilog="Exit codes: 0 drift measured (check the verdict), 2 bad input.",
    )
    p.add_argument("inputs", nargs="+", metavar="INPUT", help="repeated sweeps: files, folders or globs")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder")
    p.add_argument("--upsample", type=int, default=20, metavar="N",
                   help="registration precision 1/N pixel (default 20)")
    p.add_argument("--jump-threshold", type=float, default=6.0, metavar="Z",
                   help="a jump is a sweep-to-sweep step beyond Z robust standard deviations (default 6)")
    add_load_options(p)
    p.add_argument("--json", action="store_true", help="print the drift JSON on stdout")
    p.add_argument("--quiet", action="store_true", help="print nothing (the files are still written)")
    p.set_defaults(func=run)
