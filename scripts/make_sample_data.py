"""Write the bundled sample data of the invented device "kestrel-7".

sample_data/overnight/    an overnight run of repeated PA/PB sweeps (slow drift,
                          one charge jump, one interrupted sweep, telegraph
                          noise) in NetCDF, NPZ, long CSV and grid TSV; the
                          NetCDF files carry the generator's truth.
sample_data/calibration/  fine 1-D traces across one PA transition at seven
                          bath temperatures, for ``stabtool calibrate``.

Every file is synthetic, made by stabtool's own constant-interaction
generator; rerun this script to remake them (seeded, reproducible).
"""

from __future__ import annotations

import argparse
import shutil
from pathlib import Path

from stabtool.batch import make_overnight_sample
from stabtool.simulate import presets
from stabtool.simulate.traces import write_sample_calibration


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(Path(__file__).resolve().parents[1] / "sample_data"))
    args = parser.parse_args()
    root = Path(args.out)
    for sub in ("overnight", "calibration"):
        shutil.rmtree(root / sub, ignore_errors=True)
    sample = make_overnight_sample(root / "overnight", n_maps=24, seed=7, shape=(128, 128))
    # the calibration traces belong to the same invented device: PA's lever arm on dot 1
    lever_arm_pa = float(presets.get("si-sige-double").lever_arm[0, 0])
    traces = write_sample_calibration(root / "calibration", lever_arm=lever_arm_pa)
    print(f"wrote {len(list((root / 'overnight').iterdir()))} maps and {len(traces)} trace files under {root}")
    del sample


if __name__ == "__main__":
    main()
