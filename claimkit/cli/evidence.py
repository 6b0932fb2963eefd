"""Commands of the evidence layer: init, works, stamp, log, disclose, key."""

from __future__ import annotations

import argparse
import base64
import os
import sys
import time
from pathlib import Path

from claimkit.cli.common import SESSION_ENV, home_dir, open_profile, passphrase, print_json
from claimkit.errors import CheckFailed, InputError

CAUTION = "Technical evidence, not legal advice; rely on counsel and the local law."


# Each command imports the library modules it runs when it runs, so that `claimkit --help`
# starts in about 0.2 s rather than the 3 s that importing the whole library takes.

def _open(args, *, secrets: bool):
    from claimkit.evidence.profile import Profile

    if secrets:
        return open_profile(args)
    return Profile.open_public(home_dir(args))


def _work_id(profile, text: str) -> str:
    wid = text.strip().upper()
    if profile.work(wid) is None:
        raise InputError(f"no work {text} in the profile at {profile.home}")
    return wid


def _read(path: str) -> bytes:
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise InputError("no such file", path=path) from None
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror}", path=path) from None


# --------------------------------------------------------------------------- init

def cmd_init(args) -> int:
    from claimkit.evidence.profile import Profile

    home = home_dir(args)
    with Profile.create(home, args.owner, passphrase(confirm=True)) as p:
        info = {"home": str(p.home), "owner": p.owner,
                "public_key_sha256": p.public_key_fingerprint,
                "owner_tag": f"{p.owner_tag:04X}"}
    if args.json:
        print_json(info)
    else:
        print(f"profile created for {info['owner']} at {info['home']}")
        print(f"public key SHA-256: {info['public_key_sha256']}")
        print(f"owner tag: {info['owner_tag']}")
        print("Keep the passphrase safe: without it the keys cannot be recovered. "
              "Publish the key fingerprint somewhere you control.")
    return 0


# --------------------------------------------------------------------------- unlock, lock

def cmd_unlock(args) -> int:
    """Stretch the passphrase once; print the session variable for the shell to hold."""
    import shlex

    from claimkit.evidence.profile import Profile
    from claimkit.evidence.session import parse_lifetime

    lifetime = parse_lifetime(args.lifetime)
    with Profile.open(home_dir(args), passphrase()) as p:
        s = p.unlock(lifetime)
        owner = p.owner
    until = _utc(s.expires)
    if args.json:
        print_json({"variable": SESSION_ENV, "session": s.token, "expires": until,
                    "session_file": str(s.file), "public_key_sha256": s.profile})
    else:
        print(f"export {SESSION_ENV}={shlex.quote(s.token)}")
        print(f"claimkit: profile of {owner} unlocked until {until} ({lifetime} s) for the commands "
              f"of the shell that holds {SESSION_ENV}; end it sooner with: "
              'eval "$(claimkit lock)"', file=sys.stderr)
    return 0


def cmd_lock(args) -> int:
    """End the session named by ``$CLAIMKIT_SESSION`` (or, with ``--all``, every session)."""
    from claimkit.evidence import session

    token = os.environ.get(SESSION_ENV)
    if args.all:
        ended = session.end_all()
    else:
        ended = int(session.end(token)) if token else 0
    if args.json:
        print_json({"sessions_ended": ended, "variable": SESSION_ENV})
    else:
        print(f"unset {SESSION_ENV}")
        print(f"claimkit: {ended or 'no'} session{'' if ended == 1 else 's'} ended",
              file=sys.stderr)
    return 0


def _utc(t: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))


# --------------------------------------------------------------------------- works

def cmd_works(args) -> int:
    with _open(args, secrets=False) as p:
        stamped = p.registry.first_stamp_times()
        works = p.works()
        for w in works:
            r = w.record
            row = {"work_id": w.work_id, "serial": w.serial,
                   "registered_at": r.get("registered", {}).get("time"),
                   "original_name": r.get("original", {}).get("name"),
                   "marked_name": r.get("marked", {}).get("name"),
                   "sha256_marked": r.get("marked", {}).get("sha256"),
                   "stamped": stamped.get(w.work_id)}
            if args.json:
                print_json(row)
            else:
                when = row["stamped"] or "not stamped"
                print(f"{w.work_id}  {row['registered_at'][:19]}Z  {row['original_name']} -> "
                      f"{row['marked_name']}  [{when}]")
        if not works and not args.json:
            print(f"no works registered in {p.home}")
    return 0


def cmd_works_show(args) -> int:
    with _open(args, secrets=False) as p:
        wid = _work_id(p, args.work_id)
        work = p.work(wid)
        status = p.check_work(wid)
    problems = status.all_problems()
    if args.json:
        print_json({"work_id": wid, "ok": status.ok, "signature_ok": status.signature_ok,
                    "signature": base64.b64encode(work.signature).decode(),
                    "record_sha256": work.record_sha256, "record": work.record,
                    "stamps": [s.as_dict() for s in status.stamps], "problems": problems})
    else:
        r = work.record
        print(f"work {wid} (serial {work.serial})")
        print(f"  owner:        {r.get('owner', {}).get('name')} "
              f"(key {r.get('owner', {}).get('public_key_sha256', '')[:16]}...)")
        print(f"  original:     {r.get('original', {}).get('name')}  "
              f"sha256 {r.get('original', {}).get('sha256')}")
        print(f"  marked:       {r.get('marked', {}).get('name')}  "
              f"sha256 {r.get('marked', {}).get('sha256')}")
        print(f"  fingerprint:  {r.get('fingerprint')}")
        print(f"  registered:   {r.get('registered', {}).get('time')} (system clock)")
        cap = r.get("capture") or {}
        if cap:
            print("  capture:      " + ", ".join(f"{k}={v}" for k, v in sorted(cap.items())))
        print(f"  commitment:   {r.get('key_commitment', {}).get('value')} "
              "(to the detection seed and payload tag; opened only by claimkit disclose)")
        print(f"  record:       sha256 {work.record_sha256}")
        print("  signature:    " + ("valid (Ed25519)" if status.signature_ok else
                                    "INVALID: the record was altered"))
        if not status.stamps:
            print("  timestamps:   none (run claimkit stamp request)")
        for s in status.stamps:
            verdict = "valid" if s.ok else "INVALID: " + "; ".join(s.problems)
            print(f"  timestamp:    {s.token_id} {s.gen_time} by {s.tsa_name} "
                  f"(leaf {s.leaf_index + 1} of {s.tree_size}): {verdict}")
        for prob in status.problems:
            if "signature" not in prob:
                print(f"  problem:      {prob}")
    return 0 if status.ok else 1


# --------------------------------------------------------------------------- stamp

def cmd_stamp_request(args) -> int:
    from claimkit.evidence.storage import write_new_file

    out = Path(args.out)
    if out.exists():
        raise InputError("already exists (will not overwrite)", path=out)
    with _open(args, secrets=True) as p:
        ids = [_work_id(p, w) for w in args.works]
        req = p.stamp_request(ids or None)
        write_new_file(out, req.tsq)
    if args.json:
        print_json({"request_id": req.request_id, "output": str(out), "merkle_root": req.root,
                    "nonce": req.nonce, "works": req.work_ids})
    else:
        print(f"request {req.request_id} for {len(req.work_ids)} work(s) written to {out}")
        print(f"Merkle root (SHA-256, RFC 6962): {req.root}")
        print("send it to a timestamp authority, then: claimkit stamp attach RESPONSE.tsr "
              "--tsa-cert TSA.pem")
    return 0


def cmd_stamp_attach(args) -> int:
    from claimkit.evidence import timestamp
    from claimkit.evidence.stamping import latest_pending_tsq
    from claimkit.evidence.storage import write_new_file

    cert = _read(args.tsa_cert)
    tsq = _read(args.request) if args.request else None
    with _open(args, secrets=True) as p:
        if args.tsa_url:
            if Path(args.tsr).exists():
                raise InputError("already exists (will not overwrite the response file)",
                                 path=args.tsr)
            if tsq is None:
                tsq = latest_pending_tsq(p)
            tsr = timestamp.send_request(args.tsa_url, tsq)
            write_new_file(args.tsr, tsr)  # keep what the TSA said, accepted or not
        else:
            tsr = _read(args.tsr)
        res = p.stamp_attach(tsr, cert, tsq=tsq, tsr_path=args.tsr, cert_path=args.tsa_cert)
    if args.json:
        print_json({"token_id": res.token_id, "request_id": res.request_id,
                    "gen_time": res.gen_time, "tsa": res.tsa_name, "merkle_root": res.root,
                    "works": res.work_ids})
    else:
        print(f"token {res.token_id} attached: {len(res.work_ids)} work(s) stamped at "
              f"{res.gen_time} by {res.tsa_name}")
    return 0


# --------------------------------------------------------------------------- log

def cmd_log_verify(args) -> int:
    with _open(args, secrets=False) as p:
        report = p.audit()
    if args.json:
        doc = report.as_dict()
        # "works" is a list of work ids elsewhere; here the counts get their own names.
        for old, new in (("works", "works_checked"), ("tokens", "tokens_checked")):
            if old in doc:
                doc[new] = doc.pop(old)
        print_json(doc)
        return 0 if report.ok else 1
    for problem in report.log.problems:
        print(f"{report.log.path}: {problem}")
    for problem in report.problems:
        print(f"{p.home / 'registry.sqlite'}: {problem.removeprefix('registry: ')}")
    if report.pending_entries:
        print(f"note: {report.pending_entries} entry(ies) recorded in the registry wait to be "
              "written to the log (an interrupted run); the next command with the passphrase "
              "writes them")
    summary = (f"{report.log.lines} log entries, {report.works} work records, "
               f"{report.tokens} timestamp tokens checked")
    if report.ok:
        print(f"custody log intact: {summary}")
        return 0
    print(f"CHECK FAILED: {len(report.lines())} problem(s); {summary}")
    return 1


# --------------------------------------------------------------------------- disclose, key

def cmd_disclose(args) -> int:
    from claimkit.evidence.disclose import what_it_reveals

    with _open(args, secrets=True) as p:
        wid = _work_id(p, args.work_id)
        reveals = what_it_reveals(p, [wid])
        out = p.disclose(wid, Path(args.out))
    if args.json:
        print_json({"work_id": wid, "output": str(out), "reveals": reveals})
    else:
        print(f"disclosure for {wid} written to {out}; it reveals:")
        for line in reveals:
            print(f"  - {line}")
        print(CAUTION)
    return 0


def cmd_key_export(args) -> int:
    from claimkit.evidence.storage import atomic_write

    out = Path(args.out)
    if out.exists() and not args.force:
        raise InputError("already exists (use --force to replace)", path=out)
    with _open(args, secrets=False) as p:
        atomic_write(out, p.public_key_pem())
        fp = p.public_key_fingerprint
    if args.json:
        print_json({"output": str(out), "public_key_sha256": fp})
    else:
        print(f"public key written to {out} (SHA-256 of the raw key: {fp})")
    return 0


# --------------------------------------------------------------------------- registration

def _sub_common() -> argparse.ArgumentParser:
    """--home/--debug for the sub-commands, with SUPPRESS defaults.

    With the frame's ``common`` parent on both levels, a sub-command's default
    (None) would overwrite ``claimkit --home DIR works``'s DIR; SUPPRESS keeps
    the value given before the sub-command and still accepts it after.
    """
    p = argparse.ArgumentParser(add_help=False)
    p.add_argument("--home", metavar="DIR", default=argparse.SUPPRESS,
                   help="owner profile folder (default: $CLAIMKIT_HOME or ~/.claimkit)")
    p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                   help="show a full traceback on errors")
    from claimkit.cli import add_output_options

    add_output_options(p)
    return p


def register(sub, common) -> None:
    common = _sub_common()

    def add(parent, name, help_, func=None, **kw):
        p = parent.add_parser(name, parents=[common], help=help_, description=help_, **kw)
        if func:
            p.set_defaults(func=func)
        return p

    def json_opt(p):
        p.add_argument("--json", action="store_true", help="one JSON object per line")

    p = add(sub, "init", "create the owner profile (Ed25519 key, marking secret, registry)",
            cmd_init)
    p.add_argument("--owner", required=True, metavar="NAME", help="the owner's name")
    json_opt(p)

    p = add(sub, "unlock", "open the profile once, for a while (a session)",
            cmd_unlock, formatter_class=argparse.RawDescriptionHelpFormatter,
            epilog="Stretches the passphrase once and prints a\n"
                   f"line that sets {SESSION_ENV}; commands\n"
                   "run where it is set skip the passphrase\n"
                   "until the session ends:\n\n"
                   '  eval "$(claimkit unlock --for 30m)"\n'
                   "  claimkit examine ...\n"
                   '  eval "$(claimkit lock)"\n\n'
                   "The session key exists only in that variable.\n"
                   "The secrets are sealed under it in a file of\n"
                   "the user's runtime folder, deleted when the\n"
                   "session ends; the passphrase-sealed key file\n"
                   "is not changed.")
    p.add_argument("--for", dest="lifetime", default="1h", metavar="TIME",
                   help="how long the session lasts: 90s, 20m, 2h (default 1h, at most 12h)")
    json_opt(p)

    p = add(sub, "lock", "end the session this shell holds (prints the line that unsets it)",
            cmd_lock)
    p.add_argument("--all", action="store_true", help="end every session of this user")
    json_opt(p)

    p = add(sub, "works", "list registered works (or: works show ID)", cmd_works)
    json_opt(p)
    wsub = p.add_subparsers(dest="works_command", metavar="show")
    q = add(wsub, "show", "show one work record and check its signature and timestamps",
            cmd_works_show)
    q.add_argument("work_id", metavar="ID", help="the work id, e.g. W-D8AA-000001")
    json_opt(q)

    p = add(sub, "stamp", "RFC 3161 trusted timestamps for work records")
    ssub = p.add_subparsers(dest="stamp_command", metavar="{request,attach}", required=True)
    q = add(ssub, "request", "write a TimeStampReq over the Merkle root of work records",
            cmd_stamp_request)
    q.add_argument("works", nargs="*", metavar="WORK", help="work IDs (default: all unstamped)")
    q.add_argument("--out", required=True, metavar="FILE.tsq",
                   help="where to write the request (never replaced)")
    json_opt(q)
    q = add(ssub, "attach", "check a TimeStampResp against its request and store the token",
            cmd_stamp_attach)
    q.add_argument("tsr", metavar="FILE.tsr",
                   help="the response (with --tsa-url: where to save it)")
    q.add_argument("--tsa-cert", required=True, metavar="CERT.pem",
                   help="the certificate to trust: the TSA's own or its CA's")
    q.add_argument("--tsa-url", metavar="URL", help="send the pending request to this TSA")
    q.add_argument("--request", metavar="FILE.tsq",
                   help="the request this answers (default: matched by its digest)")
    json_opt(q)

    p = add(sub, "log", "the custody log")
    lsub = p.add_subparsers(dest="log_command", metavar="verify", required=True)
    q = add(lsub, "verify", "check the custody log chain, every record and every token",
            cmd_log_verify)
    json_opt(q)

    p = add(sub, "disclose", "write what an independent expert needs to re-check one work",
            cmd_disclose,
            epilog="Reveals the key material of the work's mark format (formats 1 and 2: the "
                   "owner-level detection seed, which finds every format-1/2 work of the "
                   "owner), the work's payload tag and commitment opening, the public key and "
                   "the signed record. Never the signing key, the marking secret or the "
                   "payload-tag key. " + CAUTION)
    p.add_argument("work_id", metavar="WORK", help="the disputed work's id")
    p.add_argument("--out", required=True, metavar="DIR", help="a new folder for the disclosure")
    json_opt(p)

    p = add(sub, "key", "the owner's public key")
    ksub = p.add_subparsers(dest="key_command", metavar="export", required=True)
    q = add(ksub, "export", "write the Ed25519 public key as PEM", cmd_key_export)
    q.add_argument("--out", required=True, metavar="FILE.pem", help="where to write the key")
    q.add_argument("--force", action="store_true", help="replace an existing file")
    json_opt(q)


__all__ = ["CheckFailed", "register"]
