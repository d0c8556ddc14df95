"""`twistrate plot RECORDING`: the figure of a recording, as PNG (and SVG where asked).

    twistrate plot run.trec                       writes run.png beside the recording
    twistrate plot run.trec --out figs/run.png --svg
    twistrate plot run.trec --config my.toml      limits and health thresholds of that service config

The joint limits come from the arm (--arm NAME_OR_FILE, else the configuration's arm, else the
packaged example arm of the recording's arm name when one exists); the health thresholds from the
service configuration (--config, else the packaged demo configuration). Needs the `plot` extra
(`pip install -e '.[plot]'`).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from twistrate.service.commands.help_text import first_paragraph
from twistrate.solver.errors import InputError, TwistrateError


def _thresholds(config: Any) -> Any:
    from twistrate.service.plot import Thresholds

    h = config.health_thresholds()
    return Thresholds(float(h.narrow_below), float(h.pinched_below))


def _limits(args: argparse.Namespace, header: dict[str, Any], config: Any) -> tuple[Any, str]:
    """(JointLimits or None, where they came from). An arm named on the command line (--arm, or the arm
    of --config) must have the recording's joints; the packaged arm of the recording's name is used only
    when it exists and matches."""
    from twistrate.service.plot import JointLimits
    from twistrate.solver.load import load_arm

    if args.arm or args.config:
        origin = f"arm {args.arm}" if args.arm else f"the arm of {args.config}"
        arm = load_arm(args.arm) if args.arm else config.load_arm()
        if list(arm.joint_names) != list(header["joints"]):
            raise InputError(
                f"--arm/--config: {origin} has joints {list(arm.joint_names)}; accepted: an arm "
                f"with the recording's joints {header['joints']}"
            )
        return JointLimits.of_arm(arm), origin
    try:
        arm = load_arm(header["arm"])
    except TwistrateError:
        return None, "not known (give --arm or --config)"
    if list(arm.joint_names) != list(header["joints"]):
        return None, "not known (give --arm or --config)"
    return JointLimits.of_arm(arm), f"the packaged arm {header['arm']!r}"


def figure_of(recording: str | Path, out: str | Path, svg: bool = False, config_path: str | None = None,
              arm: str | None = None) -> tuple[dict[str, Any], int, str]:
    """Write the figure of `recording` to `out` (PNG; and an SVG beside it when svg). config_path : the
    service configuration for the thresholds (and the arm); arm : an arm for the joint limits.
    Returns (header, records drawn, where the joint limits came from). Raises TwistrateError, OSError."""
    from twistrate.service.config import load_config
    from twistrate.service.plot import build_figure, save_figure
    from twistrate.service.recorder import read_recording

    header, rec = read_recording(recording)
    config = load_config(config_path)
    limits, origin = _limits(argparse.Namespace(arm=arm, config=config_path), header, config)
    fig = build_figure(header, rec, limits, _thresholds(config))
    out = Path(out)
    if svg:
        fig.savefig(out.with_suffix(".svg"), format="svg")
    save_figure(fig, out, "png")
    return header, len(rec), origin


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate plot", description=first_paragraph(__doc__))
    parser.add_argument("recording", help="a recording (.trec) from `serve --record`, `record` or the demo")
    parser.add_argument("--out", help="the PNG to write (default: the recording's name with .png)")
    parser.add_argument("--svg", action="store_true", help="also write an SVG beside the PNG")
    parser.add_argument("--config", help="service configuration (TOML) for the arm and health thresholds")
    parser.add_argument("--arm", help="arm file or packaged arm name for the joint limits")
    args = parser.parse_args(argv)
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        print("twistrate plot: matplotlib is missing; install the plot extra: pip install -e '.[plot]'",
              file=sys.stderr)
        return 2
    from twistrate.service.commands.demo import CAUTIONS

    print("\n".join(CAUTIONS), flush=True)
    out = Path(args.out) if args.out else Path(args.recording).with_suffix(".png")
    try:
        header, n, origin = figure_of(args.recording, out, args.svg, args.config, args.arm)
    except TwistrateError as exc:
        print(f"twistrate plot: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        print(f"twistrate plot: output: {exc}", file=sys.stderr)
        return 2
    print(f"{n} ticks of {header['arm']} (joint limits: {origin}) -> {out}"
          + (f" and {out.with_suffix('.svg')}" if args.svg else ""))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
