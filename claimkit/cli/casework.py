"""Commands of casework: case new/add/examine/export, report, verify, demo."""

from __future__ import annotations

import sys
from pathlib import Path

from claimkit.cli.common import open_profile, print_json
from claimkit.errors import CheckFailed, InputError

CAUTION = ("Technical evidence, not legal advice. Consult counsel; the rules on evidence, "
           "registration and takedown notices differ between jurisdictions.")


# Each command imports the library modules it runs when it runs, so that `claimkit --help`
# starts in about 0.2 s rather than the 3 s that importing the whole library takes.

def cmd_case_new(args) -> int:
    from claimkit.case.store import new_case

    with open_profile(args) as p:
        case = new_case(args.dir, args.title, p)
    if args.json:
        print_json({"case": str(case.root), "case_id": case.case_id, "title": case.title})
    else:
        print(f"case {case.case_id} opened in {case.root}: {case.title}")
    return 0


def cmd_case_add(args) -> int:
    from claimkit.case.store import add_exhibit, open_case

    case = open_case(args.dir)
    with open_profile(args) as p:
        out = []
        for f in args.files:
            ex = add_exhibit(case, f, source=args.source, found=args.found, by=args.by,
                             note=args.note, profile=p)
            out.append((f, ex))
    for src, ex in out:
        r = ex.record
        if args.json:
            print_json({"exhibit_id": ex.exhibit_id, "file": str(src), "stored": r["file"],
                        "sha256": r["sha256"],
                        "size": r["size"], "media_type": r["media_type"],
                        "width": r["width"], "height": r["height"]})
        else:
            print(f"{ex.exhibit_id}: {r['original_name']} taken in, {r['width']}x{r['height']}, "
                  f"{r['size']} bytes, SHA-256 {r['sha256']}")
    return 0


def cmd_case_capture(args) -> int:
    from claimkit.capture.collect import capture_pages
    from claimkit.capture.fetch import FetchOptions
    from claimkit.case.store import open_case

    case = open_case(args.dir)
    opts = FetchOptions(timeout=args.timeout, max_bytes=args.max_bytes,
                        max_redirects=args.max_redirects, ca_file=args.ca_file)
    with open_profile(args) as p:
        res = capture_pages(case, args.urls, p, tsa_url=args.tsa_url, tsa_cert=args.tsa_cert,
                            options=opts, snapshot=not args.no_snapshot)
    if args.json:
        print_json(res.as_dict())
        return 0
    print(f"captured {len(args.urls)} page(s) into {res.warc} (SHA-256 {res.warc_sha256})")
    tok = res.record.get("timestamp")
    if tok:
        print(f"WARC digest timestamped at {tok['gen_time']} by {tok['tsa']} (RFC 3161)")
    else:
        print("not timestamped: the capture time rests on this machine's clock "
              "(give --tsa-url and --tsa-cert)")
    for i in res.exhibit_ids:
        ex = case.exhibit(i)
        print(f"{i}: {ex.record['acquisition']['url']} taken in, SHA-256 {ex.sha256}")
    return 0


def cmd_case_withdraw(args) -> int:
    from claimkit.case.store import open_case, withdraw_exhibit

    case = open_case(args.dir)
    with open_profile(args) as p:
        rec = withdraw_exhibit(case, args.exhibit, reason=args.reason, by=args.by, profile=p)
    if args.json:
        print_json({"case": str(case.root), "exhibit_id": rec["exhibit_id"],
                    "status": "withdrawn", "reason": rec["reason"], "by": rec["by"],
                    "time": rec["time"]})
    else:
        print(f"{rec['exhibit_id']} withdrawn from the claims ({rec['reason']}); it stays in "
              "the case and the custody log; run claimkit report again")
    return 0


def cmd_case_examine(args) -> int:
    from claimkit.case.examine import DEFAULT_DECOYS, examine_case
    from claimkit.case.store import open_case
    from claimkit.words import verdict

    case = open_case(args.dir)
    search = [Path(p) for p in (args.originals or [])]

    def progress(ex, doc):
        r = doc["result"]
        if args.json:
            print_json({"exhibit_id": ex.exhibit_id, "file": r["file"], "detected": r["detected"],
                        "false_alarm_probability": r["false_alarm_probability"],
                        "work_id": r.get("work_id"), "message_psnr_db": r["message_psnr_db"],
                        "geometry": r["geometry"], "match": doc["match"],
                        "ssim_aligned": (doc["alignment"] or {}).get("ssim"),
                        "decoys": doc["decoy_summary"], "content": doc["content"],
                        "content_mismatch": doc["content_mismatch"],
                        "evaluation": doc["evaluation"]})
            return
        if r["detected"] and doc["content_mismatch"]:
            line = f"{ex.exhibit_id}: {doc['evaluation']['finding']}"
        elif r["detected"]:
            line = (f"{ex.exhibit_id}: {verdict(r, doc['evaluation'])}; false-alarm bound "
                    f"{r['false_alarm_text']}; {r['geometry_text']}")
        else:
            line = f"{ex.exhibit_id}: {verdict(r)}"
        al = doc.get("alignment") or {}
        if al.get("aligned"):
            line += f"; SSIM after alignment {al['ssim']:.3f}"
        d = doc["decoy_summary"]
        if d.get("count"):
            line += f"; decoys: {d['at_or_above_observed']} of {d['count']} reached the score"
        print(line)

    with open_profile(args) as p:
        examine_case(case, p, decoys=DEFAULT_DECOYS if args.decoys is None else args.decoys,
                     search=search, progress=progress, workers=args.workers,
                     robustness=not args.no_robustness,
                     reference_from_master=args.reference_from_master)
    return 0


def cmd_case_export(args) -> int:
    from claimkit.case.bundle import export_bundle
    from claimkit.case.store import open_case

    case = open_case(args.dir)
    with open_profile(args) as p:
        rep = export_bundle(case, args.out, p, force=args.force, disclose=args.disclose)
    if args.json:
        print_json(rep)
    else:
        print(f"bundle written to {rep['output']} ({rep['files']} files, SHA-256 {rep['sha256']})")
        print("Anyone can check it with: claimkit verify " + rep["output"])
    return 0


def cmd_report(args) -> int:
    from claimkit.case.store import open_case
    from claimkit.dossier.build import build_report

    case = open_case(args.dir)
    if args.out:
        out = Path(args.out)
        if out.is_dir():
            raise InputError("is a folder; --out names the PDF file", path=out)
        if out.exists() and not args.force:
            raise InputError("already exists; use --force to replace it", path=out)
        if not (out.parent if str(out.parent) else Path(".")).is_dir():
            raise InputError(f"folder {out.parent} does not exist", path=out)
    with open_profile(args) as p:
        if args.disclose:
            from claimkit.dossier.build import matched_works
            from claimkit.evidence.disclose import what_it_reveals

            # Said before it is done (and each disclosure is logged with its scope).
            lines = what_it_reveals(p, matched_works(case))
            print("claimkit: --disclose puts key material in the bundle. It reveals:",
                  file=sys.stderr)
            for line in lines or ["nothing: no exhibit matched a registered work"]:
                print(f"  - {line}", file=sys.stderr)
        rep = build_report(case, p, out_pdf=Path(args.out) if args.out else None,
                           disclose=args.disclose, include_original=args.include_original)
    if args.json:
        print_json(rep)
    else:
        print(f"dossier: {rep['output'] or rep['pdf']} (signed, PAdES)")
        print(f"same content as a web page: {rep['html']}")
        print(f"signed manifest of {rep['files']} files: {case.root / 'manifest.json'}")
        if rep["key_material"] == "withheld":
            print("no key material in the bundle: give the other side's expert a disclosure "
                  "separately (claimkit disclose WORK --out DIR), or report with --disclose")
        for w in rep["warnings"]:
            print(f"WARNING {w['code']}: {w['text']}")
        print(CAUTION)
    return 0


def cmd_verify(args) -> int:
    from claimkit.errors import InputError
    from claimkit.evidence.timestamp import load_certificates
    from claimkit.verify import verify_bundle

    roots = None
    if args.tsa_roots:
        try:
            data = Path(args.tsa_roots).read_bytes()
        except OSError as exc:
            raise InputError(f"cannot read ({exc.strerror})", path=args.tsa_roots) from None
        roots = load_certificates(data, path=args.tsa_roots)
    rep = verify_bundle(args.bundle, rerun=not args.no_rerun, expect_keys=tuple(args.expect_key),
                        tsa_roots=roots, disclosure=args.disclosure)
    verdict = rep.verdict
    if args.json:
        for c in rep.checks:
            print_json(c)
        print_json({"file": rep.bundle, "ok": rep.ok, "verdict": verdict,
                    "checks": len(rep.checks),
                    "failed": [c["check"] for c in rep.failures],
                    "unpinned": [c["check"] for c in rep.unpinned],
                    "compare_out_of_band": rep.out_of_band})
    else:
        words = {"ok": "ok      ", "failed": "FAIL    ", "unpinned": "UNPINNED",
                 "skipped": "skipped ", "not-done": "NOT DONE"}
        for c in rep.checks:
            print(f"{words[c['status']]} {c['check']}: {c['detail']}")
        if rep.ok:
            print(f"{len(rep.checks)} checks, none failed"
                  + (f"; {len(rep.unpinned)} unpinned" if rep.unpinned else ""))
        if rep.out_of_band:
            print("Before relying on this, compare out of band:")
            for line in rep.out_of_band:
                print(f"  - {line}")
    if not rep.ok:
        names = ", ".join(c["check"] for c in rep.failures)
        raise CheckFailed(f"{len(rep.failures)} check(s) failed: {names}", path=args.bundle)
    return 0


def cmd_demo(args) -> int:
    from claimkit.demo import run_demo

    out = run_demo(Path(args.dir) if args.dir else None, echo=None if args.json else print)
    if args.json:
        print_json({"output": out["folder"], "case": out["case"], "pdf": out["pdf"],
                    "html": out["html"], "zip": out["bundle"], "ok": out["verified"],
                    "checks": out["checks"], "failed": out["failed"],
                    "exhibits_detected": out["detected"], "seconds": out["seconds"]})
    return 0 if out["verified"] else 1


def register(sub, common) -> None:
    case = sub.add_parser("case", parents=[common], help="a case: disputed copies and findings",
                          description="Open a case, take in disputed copies, examine them, "
                                      "export the hand-over bundle.")
    csub = case.add_subparsers(dest="case_command", metavar="ACTION")
    csub.required = True

    p = csub.add_parser("new", parents=[common], help="open a new case folder")
    p.add_argument("dir", metavar="DIR", help="a new or empty folder for the case")
    p.add_argument("--title", required=True, metavar="T", help="a short title for the case")
    p.add_argument("--json", action="store_true", help="one JSON object")
    p.set_defaults(func=cmd_case_new)

    p = csub.add_parser("add", parents=[common], help="take in a disputed copy (byte for byte)")
    p.add_argument("dir", metavar="DIR", help="the case folder")
    p.add_argument("files", nargs="+", metavar="FILE",
                   help="the disputed files as saved (only read; copied byte for byte)")
    p.add_argument("--source", required=True, metavar="S",
                   help="where it was found (URL, shop, publication)")
    p.add_argument("--found", metavar="WHEN", help="when it was found, as you state it")
    p.add_argument("--by", metavar="NAME", help="who takes it in (default: the profile owner)")
    p.add_argument("--note", metavar="TEXT", help="a note kept with the intake record")
    p.add_argument("--json", action="store_true", help="one JSON object per file")
    p.set_defaults(func=cmd_case_add)

    p = csub.add_parser(
        "capture", parents=[common], help="capture web pages and their images as a WARC file",
        description="Fetch each page and every image it shows, keep every exchange in a "
                    "WARC/1.1 file (with addresses, TLS certificates and headers), draw a "
                    "full-page snapshot where Chromium is installed, timestamp the WARC when "
                    "a TSA is given, and take every image in as an exhibit.")
    p.add_argument("dir", metavar="CASE", help="the case folder")
    p.add_argument("urls", nargs="+", metavar="URL", help="the pages (or images) to capture")
    p.add_argument("--tsa-url", metavar="URL", help="RFC 3161 timestamp authority for the WARC")
    p.add_argument("--tsa-cert", metavar="PEM", help="certificate(s) to trust for that TSA")
    p.add_argument("--timeout", type=float, default=30.0, metavar="S",
                   help="seconds to wait for a connection or a read (default 30)")
    p.add_argument("--max-bytes", type=int, default=50 << 20, metavar="N",
                   help="largest response taken (default 50 MiB)")
    p.add_argument("--max-redirects", type=int, default=10, metavar="N",
                   help="redirects followed at most (default 10)")
    p.add_argument("--ca-file", metavar="PEM",
                   help="trust these CA certificates for HTTPS instead of the system's")
    p.add_argument("--no-snapshot", action="store_true", help="no Chromium page snapshot")
    p.add_argument("--json", action="store_true", help="one JSON object")
    p.set_defaults(func=cmd_case_capture)

    p = csub.add_parser("withdraw", parents=[common],
                        help="take an exhibit out of the claims (kept in the record)",
                        description="Withdraw an exhibit: it stays in the case, the withdrawal "
                                    "is custody-logged, examinations pass it over and the "
                                    "dossier shows it as withdrawn.")
    p.add_argument("dir", metavar="CASE", help="the case folder")
    p.add_argument("exhibit", metavar="EXHIBIT", help="the exhibit: exhibit-3, 3 or E03")
    p.add_argument("--reason", required=True, metavar="TEXT", help="why it is withdrawn")
    p.add_argument("--by", metavar="NAME", help="who withdraws it (default: the profile owner)")
    p.add_argument("--json", action="store_true", help="one JSON object")
    p.set_defaults(func=cmd_case_withdraw)

    p = csub.add_parser("examine", parents=[common], help="examine every exhibit")
    p.add_argument("dir", metavar="DIR", help="the case folder")
    p.add_argument("--originals", nargs="*", metavar="FOLDER",
                   help="folders holding the registered files (found by SHA-256) for alignment")
    p.add_argument("--decoys", type=int, default=None, metavar="N",
                   help="random decoy keys in the control (default 64)")
    p.add_argument("--workers", type=int, default=1, metavar="N",
                   help="threads for the Fourier transforms (default 1)")
    p.add_argument("--no-robustness", action="store_true",
                   help="skip the robustness battery on the registered marked file")
    p.add_argument("--reference-from-master", action="store_true",
                   help="when only the unmarked master is at hand, compare copies with a "
                        "reduced reference made from it (it goes into the bundle, and beside "
                        "the published file it gives away much of the mark)")
    p.add_argument("--json", action="store_true", help="JSON output, one object per line")
    p.set_defaults(func=cmd_case_examine)

    p = csub.add_parser("export", parents=[common], help="pack the hand-over bundle (zip)")
    p.add_argument("dir", metavar="DIR", help="the case folder")
    p.add_argument("--out", required=True, metavar="FILE.zip", help="the bundle to write")
    p.add_argument("--force", action="store_true", help="replace an existing --out file")
    p.add_argument("--disclose", action="store_true",
                   help="require that the bundle carries key material (build the report "
                        "with --disclose first)")
    p.add_argument("--json", action="store_true", help="one JSON object")
    p.set_defaults(func=cmd_case_export)

    p = sub.add_parser("report", parents=[common], help="build the signed dossier of a case",
                       description="Build the dossier (PDF signed the PDF way, HTML, data), "
                                   "the works' public evidence, a custody excerpt and the signed "
                                   "manifest; key material only with --disclose.")
    p.add_argument("dir", metavar="DIR", help="the case folder")
    p.add_argument("--out", metavar="FILE.pdf", help="also write the PDF here")
    p.add_argument("--disclose", action="store_true",
                   help="put the matched works' key material in the bundle, after saying "
                        "what it reveals (default: none)")
    p.add_argument("--include-original", action="store_true",
                   help="put the unmarked master in the bundle when a finding aligns to it "
                        "(default: withheld, named by its hash)")
    p.add_argument("--force", action="store_true", help="replace an existing --out file")
    p.add_argument("--json", action="store_true", help="JSON output, one object per line")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("verify", parents=[common], help="check a hand-over bundle",
                       description="Check every hash, signature, timestamp token and the "
                                   "custody chain of a bundle, and re-run every examination. "
                                   "Exit 0 only when every check passes.")
    p.add_argument("bundle", metavar="BUNDLE_OR_DIR",
                   help="the hand-over bundle (zip) or an unpacked case folder")
    p.add_argument("--expect-key", action="append", default=[], metavar="SHA256",
                   help="the owner key fingerprint you obtained from the owner yourself "
                        "(repeatable); without it the signer is reported unpinned")
    p.add_argument("--tsa-roots", metavar="FILE",
                   help="PEM file of the timestamp authorities' root certificates you trust; "
                        "without it the timestamps are reported unpinned")
    p.add_argument("--disclosure", metavar="DIR",
                   help="a key disclosure delivered apart from the bundle (needed to re-run "
                        "the examinations when the bundle holds no key material)")
    p.add_argument("--no-rerun", action="store_true",
                   help="check integrity only: hashes, signatures, tokens, custody; no re-run")
    p.add_argument("--json", action="store_true", help="JSON output, one object per line")
    p.set_defaults(func=cmd_verify)

    p = sub.add_parser("demo", parents=[common], help="run the whole job on a fictional case",
                       description="A fictional photographer, a marked photo, two unlicensed "
                                   "copies, a dossier and its verification, end to end.")
    p.add_argument("dir", nargs="?", metavar="DIR", help="where to put it (default: a new "
                                                         "folder claimkit-demo-*)")
    p.add_argument("--json", action="store_true", help="JSON output, one object per line")
    p.set_defaults(func=cmd_demo)

