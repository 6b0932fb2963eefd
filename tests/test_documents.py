"""Every evidence document: one reader and one writer, round trips, and precise refusals."""

from __future__ import annotations

import json
import zipfile
from pathlib import Path

import pytest

from claimkit.case.documents import (
    CaseDoc,
    DossierDataDoc,
    ExhibitDoc,
    FindingDoc,
    ManifestDoc,
    SchemaError,
)
from claimkit.evidence.canonical import canonical_json

OLD = Path(__file__).parent / "fixtures" / "bundle-0.2.0.zip"
STORED = [(CaseDoc, "case.json"), (ExhibitDoc, "exhibits/E01.json"),
          (FindingDoc, "findings/E01.json"), (ManifestDoc, "manifest.json")]


def _stored(name: str) -> tuple[bytes, dict]:
    with zipfile.ZipFile(OLD) as zf:
        raw = zf.read(name)
    return raw, json.loads(raw)


@pytest.mark.parametrize("cls,name", STORED)
def test_stored_documents_round_trip_to_the_byte(cls, name, tmp_path):
    raw, doc = _stored(name)
    typed = cls.from_json(doc, path=name)
    assert typed.to_json() == doc
    assert cls.from_json(typed.to_json()) == typed
    # The writer stores what claimkit 0.2.0 stored, byte for byte.
    written = typed.write(tmp_path / "doc.json")
    assert written == raw == (tmp_path / "doc.json").read_bytes()
    assert cls.read(tmp_path / "doc.json") == typed


def test_dossier_data_round_trips(tmp_path):
    _, old = _stored("report/dossier.json")
    doc = {**old, "type": DossierDataDoc.type_name()}
    typed = DossierDataDoc.from_json(doc)
    assert typed.to_json() == doc
    written = typed.write(tmp_path / "x.json")
    assert written == (tmp_path / "x.json").read_bytes() == canonical_json(doc) + b"\n"
    assert DossierDataDoc.read(tmp_path / "x.json") == typed


def test_the_older_dossier_schema_is_refused_with_the_reason():
    _, old = _stored("report/dossier.json")
    with pytest.raises(SchemaError) as e:
        DossierDataDoc.from_json(old, path="report/dossier.json")
    assert "claimkit/dossier/v1" in e.value.message and "claimkit 0.2.0" in e.value.message


@pytest.mark.parametrize("cls,name", STORED)
def test_newer_versions_other_kinds_and_missing_fields_are_named(cls, name):
    _, doc = _stored(name)
    newer = {**doc, "type": f"claimkit/{cls.KIND}/v{cls.VERSION + 1}"}
    with pytest.raises(SchemaError, match="newer claimkit"):
        cls.from_json(newer)
    with pytest.raises(SchemaError, match=f"is not a claimkit {cls.KIND}"):
        cls.from_json({**doc, "type": "claimkit/something-else/v1"})
    with pytest.raises(SchemaError, match="not a JSON object"):
        cls.from_json([doc])
    first = next(k for k in cls._known() if k in doc)
    with pytest.raises(SchemaError, match=f"lacks {first}"):
        cls.from_json({k: v for k, v in doc.items() if k != first})


def test_fields_a_later_version_adds_are_kept():
    _, doc = _stored("findings/E01.json")
    doc = {**doc, "later_field": {"log10_lr": 6.1}}
    typed = FindingDoc.from_json(doc)
    assert typed.extra == {"later_field": {"log10_lr": 6.1}}
    assert typed.to_json() == doc and typed["later_field"]["log10_lr"] == 6.1


def test_missing_and_damaged_files_are_bad_input(tmp_path):
    from claimkit.errors import InputError

    with pytest.raises(InputError, match="missing"):
        CaseDoc.read(tmp_path / "case.json")
    (tmp_path / "case.json").write_text("{not json")
    with pytest.raises(InputError, match="not JSON"):
        CaseDoc.read(tmp_path / "case.json")


def test_withdrawal_round_trips_and_is_never_replaced(tmp_path):
    from claimkit.case.documents import WithdrawalDoc
    from claimkit.errors import AlreadyExists

    doc = WithdrawalDoc(exhibit_id="exhibit-2", case_id="C-20261202-ABC123",
                        exhibit_sha256="ab" * 32, reason="the shop holds a licence after all",
                        by="Ilse Marrow", time="2026-12-02T10:00:00Z",
                        time_source="system clock")
    data = doc.write(tmp_path / "w.json", replace=False)
    assert json.loads(data)["type"] == "claimkit/withdrawal/v1"
    assert WithdrawalDoc.read(tmp_path / "w.json") == doc
    assert WithdrawalDoc.from_json(doc.to_json()).to_json() == doc.to_json()
    with pytest.raises(AlreadyExists):
        doc.write(tmp_path / "w.json", replace=False)
