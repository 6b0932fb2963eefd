"""``claimkit rights``: the rights fields written into every marked file."""

from __future__ import annotations

from claimkit.cli.common import home_dir, print_json
from claimkit.filemeta import DATA_MINING

_FIELDS = (
    ("creator", "--creator", "NAME", "Creator (XMP dc:creator; IIM By-line)"),
    ("copyright", "--copyright", "TEXT", "Copyright Notice (XMP dc:rights; IIM Copyright Notice)"),
    ("credit", "--credit", "TEXT", "Credit Line (XMP photoshop:Credit; IIM Credit)"),
    ("web_statement", "--web-statement", "URL",
     "Web Statement of Rights (XMP xmpRights:WebStatement): a page stating the terms"),
    ("licensor_url", "--licensor-url", "URL",
     "Licensor URL (XMP plus:Licensor/LicensorURL): where to ask for a licence"),
)


def add_rights_options(p, *, for_mark: bool) -> None:
    """The rights options, shared by ``rights set`` and ``mark`` (which overrides per run)."""
    what = "for this run (default: the profile's, see claimkit rights show)" if for_mark else ""
    for _name, flag, metavar, help_ in _FIELDS:
        p.add_argument(flag, metavar=metavar, default=None, help=f"{help_} {what}".strip())
    p.add_argument("--data-mining", choices=sorted(DATA_MINING), default=None, metavar="TERM",
                   help="IPTC Data Mining property (plus:DataMining, PLUS vocabulary), one of "
                        + ", ".join(sorted(DATA_MINING)) + " " + what)
    if for_mark:
        p.add_argument("--replace-rights", action="store_true",
                       help="overwrite rights fields the original already holds (default: "
                            "keep them)")


def rights_from_args(args, base):
    """``base`` with the fields given on the command line."""
    given = {name: getattr(args, name, None) for name, *_ in _FIELDS}
    given["data_mining"] = getattr(args, "data_mining", None)
    out = base.merged(**given)
    if getattr(args, "replace_rights", False):
        out = out.merged(replace=True)
    return out


def _owner(home) -> str:
    from claimkit.evidence.profile import Profile

    with Profile.open_public(home) as p:
        return p.owner


def cmd_rights_show(args) -> int:
    from claimkit.evidence.rights import load_rights

    home = home_dir(args)
    rights = load_rights(home, _owner(home))
    _print(args, home, rights)
    return 0


def cmd_rights_set(args) -> int:
    from claimkit.evidence.rights import load_rights, save_rights

    home = home_dir(args)
    rights = rights_from_args(args, load_rights(home, _owner(home)))
    for name in args.clear or []:
        rights = rights.__class__(**{**rights.as_json(), name.replace("-", "_"): None})
    save_rights(home, rights)
    _print(args, home, rights)
    return 0


def _print(args, home, rights) -> None:
    if args.json:
        print_json({"home": str(home), **rights.as_json()})
        return
    for name, value in rights.as_json().items():
        print(f"{name.replace('_', ' ')}: {value if value is not None else '(not written)'}")


def register(sub, common) -> None:
    p = sub.add_parser("rights", parents=[common], help="rights fields written into marked files",
                       description="The IPTC rights fields claimkit writes into every marked file "
                                   "(XMP, and IIM where the file has IIM). Values already in an "
                                   "original are kept unless mark --replace-rights.")
    rsub = p.add_subparsers(dest="rights_command", metavar="{show,set}", required=True)
    q = rsub.add_parser("show", parents=[common], help="the profile's rights fields",
                        description="Print the rights fields the profile writes by default.")
    q.add_argument("--json", action="store_true", help="one JSON object")
    q.set_defaults(func=cmd_rights_show)
    q = rsub.add_parser("set", parents=[common], help="change the profile's rights fields",
                        description="Set the defaults written into every marked file.")
    add_rights_options(q, for_mark=False)
    q.add_argument("--clear", nargs="+", metavar="FIELD",
                   choices=["creator", "copyright", "credit", "web-statement", "licensor-url",
                            "data-mining"],
                   help="stop writing these fields")
    q.add_argument("--json", action="store_true", help="one JSON object")
    q.set_defaults(func=cmd_rights_set)
