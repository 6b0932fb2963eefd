"""The owner's default rights fields (``rights.json`` in the profile folder).

Written into every marked file by :mod:`claimkit.filemeta`. Not secret and
not signed: what a marked file says about its rights is covered by the
marked file's hash in the signed work record, whatever the defaults were.
"""

from __future__ import annotations

import json
from pathlib import Path

from claimkit.errors import ProfileError
from claimkit.evidence.storage import atomic_write
from claimkit.filemeta import Rights

RIGHTS_FILE = "rights.json"
_FIELDS = ("creator", "copyright", "credit", "web_statement", "licensor_url", "data_mining")


def default_rights(owner: str) -> Rights:
    """What ``init --owner NAME`` starts with: the owner as creator and credit, a notice."""
    return Rights(creator=owner, copyright=f"© {owner}. All rights reserved.", credit=owner)


def load_rights(home: Path, owner: str) -> Rights:
    """The stored defaults, else :func:`default_rights`."""
    path = Path(home) / RIGHTS_FILE
    if not path.is_file():
        return default_rights(owner)
    try:
        doc = json.loads(path.read_bytes())
    except ValueError:
        raise ProfileError("is not JSON", path=path) from None
    rights = Rights(**{k: doc.get(k) for k in _FIELDS})
    rights.check()
    return rights


def save_rights(home: Path, rights: Rights) -> Path:
    rights.check()
    path = Path(home) / RIGHTS_FILE
    atomic_write(path, (json.dumps(rights.as_json(), indent=2, ensure_ascii=False,
                                   sort_keys=True) + "\n").encode("utf-8"))
    return path
