"""A delivery's lineage as W3C PROV-JSON (``nodekeep trace --file F --prov OUT.json``).

Checked against the standard, not against nodekeep: the document is read back by the ``prov``
library (the reference implementation of the PROV data model in Python) and its structure is
checked against the W3C PROV-JSON Member Submission (www.w3.org/Submission/prov-json/, 2013):
the top-level member names, each record a JSON object keyed by its identifier, the required
attributes of each relation, every qualified name's prefix declared. Then its content: every
raw log of the delivery is an entity the delivered file derives from.
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import pytest
from click.testing import CliRunner
from prov.model import ProvDocument

from archive.cli.main import cli
from archive.lineage.prov import delivery_provenance
from archive.store.archive import Archive
from tests.support.delivered import Delivered

# Top-level members of a PROV-JSON document (W3C PROV-JSON Submission §2, from memory of
# its Table 1: the record types of PROV-DM and the "prefix" and "bundle" members).
PROV_JSON_MEMBERS = {
    "prefix", "entity", "activity", "agent", "wasGeneratedBy", "used", "wasInformedBy",
    "wasStartedBy", "wasEndedBy", "wasInvalidatedBy", "wasDerivedFrom", "wasAttributedTo",
    "wasAssociatedWith", "actedOnBehalfOf", "wasInfluencedBy", "specializationOf",
    "alternateOf", "hadMember", "mentionOf", "bundle"}
# Required attributes of the relations used here (PROV-DM §5 via the PROV-JSON attribute
# names, from memory): the generated/used entity, the activity, the agent.
REQUIRED = {
    "wasGeneratedBy": {"prov:entity"}, "used": {"prov:activity"},
    "wasDerivedFrom": {"prov:generatedEntity", "prov:usedEntity"},
    "wasAttributedTo": {"prov:entity", "prov:agent"},
    "wasAssociatedWith": {"prov:activity"},
    "wasInformedBy": {"prov:informed", "prov:informant"}}
PREDEFINED_PREFIXES = {"prov", "xsd"}  # PROV-JSON §2.1: always available
XSD_DATETIME = re.compile(r"^-?\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?(Z|[+-]\d\d:\d\d)?$")


@pytest.fixture(scope="module")
def prov_doc(delivered_survey_archive: Delivered, tmp_path_factory) -> tuple[dict, Path]:
    d = delivered_survey_archive
    out = tmp_path_factory.mktemp("prov") / "receivers.prov.json"
    res = CliRunner().invoke(
        cli, ["-A", str(d.root), "trace", "--file", d.sps.path, "--prov", str(out), "--json"])
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert data["prov"]["path"] == str(out) and data["prov"]["entity"] > 0
    return json.loads(out.read_text(encoding="utf-8")), out


def _qnames(value) -> list[str]:
    """Every qualified name used as an identifier or a reference in a record."""
    if isinstance(value, dict):
        if value.get("type") == "prov:QUALIFIED_NAME":
            return [value["$"]]
        return [q for v in value.values() for q in _qnames(v)]
    if isinstance(value, list):
        return [q for v in value for q in _qnames(v)]
    return []


def test_prov_json_structure(prov_doc):
    doc, path = prov_doc
    assert set(doc) <= PROV_JSON_MEMBERS and {"entity", "activity", "agent"} <= set(doc)
    prefixes = set(doc["prefix"]) | PREDEFINED_PREFIXES
    for member, records in doc.items():
        if member == "prefix":
            assert all(isinstance(v, str) for v in records.values())
            continue
        assert isinstance(records, dict)
        for ident, rec in records.items():
            assert isinstance(rec, dict)
            if not ident.startswith("_:"):  # blank identifiers need no prefix
                assert ident.split(":", 1)[0] in prefixes, ident
            missing = REQUIRED.get(member, set()) - set(rec)
            assert not missing, (member, ident, missing)
            for key, value in rec.items():
                assert key.split(":", 1)[0] in prefixes, key
                if key in ("prov:time", "prov:startTime", "prov:endTime"):
                    assert XSD_DATETIME.match(value), value
                if key in REQUIRED.get(member, ()):  # references: declared qualified names
                    assert value.split(":", 1)[0] in prefixes, (key, value)
            assert all(q.split(":", 1)[0] in prefixes for q in _qnames(rec))
    # the reference implementation reads it back, record for record
    again = ProvDocument.deserialize(content=path.read_text(encoding="utf-8"), format="json")
    assert len(again.get_records()) == sum(len(v) for k, v in doc.items() if k != "prefix")
    back = json.loads(again.serialize(format="json"))
    for member in ("entity", "activity", "agent"):  # named records come back as they were
        assert back[member] == doc[member]
    for member in set(doc) - {"prefix", "entity", "activity", "agent"}:
        # relations are anonymous (blank identifiers, renumbered on each serialisation)
        assert sorted(map(_canon, back[member].values())) == \
            sorted(map(_canon, doc[member].values()))


def _canon(record: dict) -> str:
    return json.dumps(record, sort_keys=True)


def _derived_from(doc: dict, start: str) -> set[str]:
    edges: dict[str, set[str]] = {}
    for rec in doc.get("wasDerivedFrom", {}).values():
        edges.setdefault(rec["prov:generatedEntity"], set()).add(rec["prov:usedEntity"])
    seen, todo = set(), [start]
    while todo:
        for nxt in edges.get(todo.pop(), ()):
            if nxt not in seen:
                seen.add(nxt)
                todo.append(nxt)
    return seen


def test_every_raw_log_is_an_entity_the_delivered_file_derives_from(
        prov_doc, delivered_survey_archive: Delivered):
    doc, _ = prov_doc
    d = delivered_survey_archive
    file_hash = hashlib.sha256(Path(d.sps.path).read_bytes()).hexdigest()
    delivered = f"sha256:{file_hash}"
    assert doc["prefix"]["sha256"] == "nih:sha-256;"  # RFC 6920 §7 human-readable form
    assert delivered in doc["entity"]
    lineage = json.loads(Path(d.sps.lineage_path).read_text(encoding="utf-8"))
    raw = {f"sha256:{r['hash']}" for r in lineage["raw_files"]}
    assert len(raw) >= 10 and raw <= set(doc["entity"])
    ancestors = _derived_from(doc, delivered)
    assert raw <= ancestors
    # the input tables and the edits the delivery rests on are ancestors too
    inputs = {f"sha256:{h}" for k, h in lineage["inputs"].items()
              if k != "fixes" and isinstance(h, str)}
    edits = {f"sha256:{e['digest']}" for e in lineage["edits"]}
    assert inputs and edits and inputs | edits <= ancestors
    # activities: a load per raw log, the solve, each edit and the delivery, with agents
    kinds = [a["prov:type"]["$"] for a in doc["activity"].values()]
    assert kinds.count("nodekeep:LoadRawLog") == len(raw)
    assert {"nodekeep:Solve", "nodekeep:Delivery", "nodekeep:Edit"} <= set(kinds)
    agents = {a["prov:label"] for a in doc["agent"].values()}
    assert "tester" in agents


def test_library_and_command_agree(prov_doc, delivered_survey_archive: Delivered):
    doc, _ = prov_doc
    with Archive.open(delivered_survey_archive.root, read_only=True) as arc:
        again = delivery_provenance(arc, delivery_id=delivered_survey_archive.sps.delivery_id)
    assert json.loads(again.json_text()) == doc
    # and the reference library sees the same document in the file as in the object
    assert ProvDocument.deserialize(content=json.dumps(doc), format="json") == again.document


def test_prov_needs_a_delivered_file(delivered_survey_archive: Delivered, tmp_path):
    d = delivered_survey_archive
    r = CliRunner().invoke(cli, ["-A", str(d.root), "trace", "1001", "5001", "--prov",
                                 str(tmp_path / "x.json")])
    assert r.exit_code == 2 and "--prov describes a delivered file" in r.stderr
    (tmp_path / "x.json").write_text("{}")
    r = CliRunner().invoke(cli, ["-A", str(d.root), "trace", "--file", d.csv.path, "--prov",
                                 str(tmp_path / "x.json")])
    assert r.exit_code == 4 and "already exists" in r.stderr
