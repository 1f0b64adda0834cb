"""Make docs/demo-das.png and docs/demo-mvdr.png: the built-in demo beamformed both ways.

    python docs/make_mvdr_pictures.py [--seconds 40]

The way a user would do it, with the command line: ``beamtap simulate`` writes the demo
scene (the boat crossing past the pinger at 118°), ``beamtap process`` beamforms it with the
demo config as it is and with its commented MVDR lines uncommented, and ``beamtap picture``
draws each run's bearing against time.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
from importlib.resources import files
from pathlib import Path

HERE = Path(__file__).resolve().parent
MVDR_LINES = ['# method = "mvdr"', "# adaptive = {"]


def beamtap(*args: str) -> None:
    subprocess.run([sys.executable, "-m", "beamtap", *args], check=True, stdout=subprocess.DEVNULL)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=40.0, help="length of the simulated scene")
    args = ap.parse_args()
    demo = files("beamtap.service").joinpath("demo.toml").read_text()
    variant = demo
    for line in MVDR_LINES:
        variant = variant.replace(line, line[2:])
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        (tmp / "demo.toml").write_text(demo)
        (tmp / "demo-mvdr.toml").write_text(variant)
        beamtap("simulate", str(tmp / "demo.toml"), "--seconds", str(args.seconds), "--out", str(tmp / "scene.wav"))
        for name in ("demo", "demo-mvdr"):
            beamtap("process", "--config", str(tmp / f"{name}.toml"), str(tmp / "scene.wav"), "--out",
                    str(tmp / name))
            picture = HERE / ("demo-das.png" if name == "demo" else "demo-mvdr.png")
            beamtap("picture", str(tmp / name), "--range-db", "15", "--out", str(picture), "--overwrite")
            print(picture)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
