"""The ``stress`` command: run the attack battery on a marked photo before publishing it."""

from __future__ import annotations

from pathlib import Path

from claimkit.cli.common import open_profile, print_json
from claimkit.errors import InputError
from claimkit.mark.stats import DEFAULT_THRESHOLD
from claimkit.words import probability

# Each command imports the library modules it runs when it runs, so that `claimkit --help`
# starts in about 0.2 s rather than the 3 s that importing the whole library takes.

def _table_line(r: dict) -> str:
    from claimkit.stress import geometry_text

    found = "yes" if r["detected"] else "NO"
    same = {True: "yes", False: "NO", None: "-"}[r["same_payload"]]
    psnr = "-" if r["message_psnr_db"] is None else f"{r['message_psnr_db']:.1f}"
    geo = geometry_text(r)
    if r["detected"] and not r["geometry_ok"]:
        geo += "  (off)"
    return (f"{r['attack']:<28} {r['width']:>5}x{r['height']:<5} {found:<5} {same:<5} "
            f"{probability(r['log10_false_alarm_probability']):>14} {psnr:>6}  {geo}")


def cmd_stress(args) -> int:
    from claimkit import workflow
    from claimkit.evidence.storage import atomic_write
    from claimkit.imageio import read_picture
    from claimkit.stress import plot_png, run_battery, summary

    marked = Path(args.marked)
    plot = Path(args.plot) if args.plot else None
    if plot is not None:
        if plot.suffix.lower() != ".png":
            raise InputError("the plot is written as PNG; give a name ending in .png", path=plot)
        if plot.exists() and not args.force:
            raise InputError("already exists; use --force to replace it", path=plot)
        if marked.exists() and plot.resolve() == marked.resolve():
            raise InputError("the plot would overwrite the marked photo", path=plot)
    workflow.check_threshold(args.threshold)
    pic = read_picture(marked, max_pixels=args.max_pixels)
    if min(pic.pixels.shape[:2]) < workflow.MIN_MARK_SIDE:
        h, w = pic.pixels.shape[:2]
        raise InputError(f"image is {w}x{h} pixels; the battery needs at least "
                         f"{workflow.MIN_MARK_SIDE} pixels on each side", path=marked)
    with open_profile(args) as profile:
        seed = profile.detection_seed
        check = workflow.owner_payload_check(profile)
    if not args.json:
        print(f"{'attack':<28} {'size':>11} {'found':<5} {'same':<5} {'P_fa':>9} {'PSNR':>6}  "
              f"geometry: true -> estimated")

    def show(row):
        if args.json:
            print_json({"file": str(marked), **row})
        else:
            print(_table_line(row), flush=True)

    rows = run_battery(pic.pixels, seed, check, quick=args.quick, threshold=args.threshold,
                       workers=args.workers, progress=show)
    if plot is not None:
        atomic_write(plot, plot_png(rows, title=f"{marked.name}: what the mark survives",
                                    threshold=args.threshold))
    if not args.json:
        s = summary(rows)
        line = f"found in {s['detected']} of {s['attacks']} copies, geometry right in {s['geometry_ok']}"
        if s["other_payload"]:
            line += f"; found with a different payload: {', '.join(s['other_payload'])}"
        if s["missed"]:
            line += f"; not found: {', '.join(s['missed'])}"
        print(line)
        if plot is not None:
            print(f"plot written to {plot}")
        print("claimkit gives technical evidence, not legal advice.")
    return 0


def register(sub, common) -> None:
    p = sub.add_parser("stress", parents=[common], help="how much abuse a marked photo survives",
                       description="Attack a marked photo the way copiers do (JPEG, resizing, "
                                   "rotation and cropping, mirror, filters, a social-media "
                                   "upload) and examine every copy blind with the owner's key.")
    p.add_argument("marked", metavar="MARKED", help="a photo marked with this profile")
    p.add_argument("--json", action="store_true", help="one JSON object per attack, one per line")
    p.add_argument("--plot", metavar="FILE.png", help="also draw the results as a PNG")
    p.add_argument("--force", action="store_true", help="replace an existing plot")
    p.add_argument("--quick", action="store_true", help="a shorter battery (one or two of each kind)")
    p.add_argument("--threshold", type=float, default=DEFAULT_THRESHOLD,
                   help="largest false-alarm bound called 'found' (default 1e-9)")
    p.add_argument("--workers", type=int, default=1, metavar="N", help="threads for the transforms")
    p.add_argument("--max-pixels", type=int, default=None, metavar="N",
                   help="refuse images with more pixels (decompression-bomb guard)")
    p.set_defaults(func=cmd_stress)
