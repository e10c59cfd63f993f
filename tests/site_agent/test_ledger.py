"""The site ledger (site_agent.ledger): hash chain, signatures, and `site-agent ledger verify|show`.

Each kind of tampering is made on a real ledger file and must be named by `verify` at the first bad line.
Reference for the primitives: Ed25519 (RFC 8032) through the `cryptography` package; SHA-256 (FIPS 180-4).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from federation.protocol import canonical_bytes, load_private_key, sha256_hex, write_keypair
from federation.protocol.keys import sign
from site_agent import ledger
from site_agent.cli import main as site_agent
from site_agent.config import init_site, load_site
from site_agent.ledger import LedgerError


@pytest.fixture
def site(tmp_path: Path):  # noqa: ANN201
    _, coordinator_pub = write_keypair(tmp_path / "coordinator", "coordinator")
    root = init_site(tmp_path / "site", "site-a", [coordinator_pub])
    site = load_site(root)
    key = site.private_key()
    for i in range(5):
        ledger.append(site.ledger_path, key, "request_received", {"request_sha256": f"{i:064x}"})
    return site


def lines(site) -> list[str]:  # noqa: ANN001
    return site.ledger_path.read_text().splitlines(keepends=True)


def write(site, content: list[str]) -> None:  # noqa: ANN001
    site.ledger_path.write_text("".join(content))


def verify_error(site) -> str:  # noqa: ANN001
    with pytest.raises(LedgerError) as error:
        ledger.verify_ledger(site.ledger_path, site.public_key())
    return str(error.value)


def test_an_intact_ledger_verifies(site) -> None:  # noqa: ANN001
    assert ledger.verify_ledger(site.ledger_path, site.public_key()) == 5
    entries = ledger.read_entries(site.ledger_path)
    assert [e["seq"] for e in entries] == [1, 2, 3, 4, 5]
    assert entries[0]["prev"] == "0" * 64
    assert all(entries[i]["prev"] == entries[i - 1]["hash"] for i in range(1, 5))
    # the hash is SHA-256 of the canonical JSON of the fields before it
    fields = {k: entries[2][k] for k in ("seq", "time", "event", "details", "prev")}
    assert entries[2]["hash"] == sha256_hex(canonical_bytes(fields))


def test_an_edited_entry_is_named(site) -> None:  # noqa: ANN001
    content = lines(site)
    content[2] = content[2].replace('"request_sha256":"' + "0" * 63 + "2", '"request_sha256":"' + "0" * 63 + "9")
    write(site, content)
    assert "line 3: entry was edited" in verify_error(site)


def test_a_deleted_entry_is_named(site) -> None:  # noqa: ANN001
    content = lines(site)
    del content[1]
    write(site, content)
    message = verify_error(site)
    assert "line 2: sequence number 3 where 2 was expected" in message and "deleted" in message


def test_an_inserted_entry_is_named(site) -> None:  # noqa: ANN001
    content = lines(site)
    content.insert(2, content[1])  # a copy of a genuine, correctly signed entry
    write(site, content)
    message = verify_error(site)
    assert "line 3: sequence number 2 where 3 was expected" in message and "inserted" in message


def test_reordered_entries_are_named(site) -> None:  # noqa: ANN001
    content = lines(site)
    content[1], content[2] = content[2], content[1]
    write(site, content)
    assert "line 2: sequence number 3 where 2 was expected" in verify_error(site)


def test_a_rewritten_chain_signed_by_another_key_is_named(site, tmp_path: Path) -> None:  # noqa: ANN001
    # Someone edits entry 4 and recomputes its hash and the chain after it, but has only their own key.
    other = load_private_key(write_keypair(tmp_path / "intruder", "intruder")[0])
    entries = ledger.read_entries(site.ledger_path)
    entries[3]["details"]["request_sha256"] = "f" * 64
    prev = entries[2]["hash"]
    for entry in entries[3:]:
        fields = {k: entry[k] for k in ("seq", "time", "event", "details", "prev")}
        fields["prev"] = prev
        entry.update(fields, hash=sha256_hex(canonical_bytes(fields)))
        entry["signature"] = sign(other, entry["hash"].encode("ascii"))
        prev = entry["hash"]
    write(site, [json.dumps(e, sort_keys=True, separators=(",", ":")) + "\n" for e in entries])
    assert "line 4: signature is not by the site key" in verify_error(site)


def test_a_ledger_checked_against_another_key_fails_at_line_1(site, tmp_path: Path) -> None:  # noqa: ANN001
    _, other_pub = write_keypair(tmp_path / "other", "other")
    code = site_agent(["ledger", "verify", "--site-dir", str(site.root), "--public-key", str(other_pub)])
    assert code == 2


def test_a_cut_off_last_line_and_an_empty_line_are_named(site) -> None:  # noqa: ANN001
    content = lines(site)
    write(site, [*content[:4], content[4][:40]])
    assert "line 5: incomplete entry" in verify_error(site)
    write(site, [*content[:2], "\n", *content[2:]])
    assert "line 3: empty line" in verify_error(site)


def test_entries_cut_from_the_end_are_caught_by_a_release_copy(site) -> None:  # noqa: ANN001
    key = site.private_key()
    document = b'{"kind": "release"}\n'
    ledger.append(site.ledger_path, key, "release", {"release_sha256": sha256_hex(document), "release": "..."})
    (site.releases_dir / "s-r.json").write_bytes(document)
    assert ledger.check_copies(site.ledger_path, site.releases_dir) == []
    write(site, lines(site)[:-1])  # the release entry removed: the chain alone is still valid
    assert ledger.verify_ledger(site.ledger_path, site.public_key()) == 5
    assert ledger.check_copies(site.ledger_path, site.releases_dir) == ["s-r.json"]


def test_cli_verify_names_the_line_in_one_error_line(site, capsys) -> None:  # noqa: ANN001
    assert site_agent(["ledger", "verify", "--site-dir", str(site.root)]) == 0
    assert "5 entries, chain and signatures intact" in capsys.readouterr().out
    content = lines(site)
    content[3] = content[3].replace('"event":"request_received"', '"event":"refusal"')
    write(site, content)
    assert site_agent(["ledger", "verify", "--site-dir", str(site.root)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "line 4: entry was edited" in err[0]


def test_show_flags_a_release_that_was_not_handed_over(site, capsys) -> None:  # noqa: ANN001
    key = site.private_key()
    ledger.append(site.ledger_path, key, "release", {"study_id": "s", "request_id": "r1", "release_sha256": "a" * 64})
    ledger.append(site.ledger_path, key, "sent", {"release_sha256": "a" * 64, "via": "file", "path": "/x.json"})
    ledger.append(site.ledger_path, key, "release", {"study_id": "s", "request_id": "r2", "release_sha256": "b" * 64})
    assert [e["details"]["request_id"] for e in ledger.unsent(site.ledger_path)] == ["r2"]
    assert site_agent(["ledger", "show", "--site-dir", str(site.root)]) == 0
    out = capsys.readouterr().out
    assert "release bbbbbbbbbbbb (entry 8) has no 'sent' entry" in out
    assert "aaaaaaaaaaaa (entry 6)" not in out


def test_unknown_events_are_refused(site) -> None:  # noqa: ANN001
    with pytest.raises(ValueError):
        ledger.append(site.ledger_path, site.private_key(), "shipped", {})


def test_a_noted_head_catches_entries_cut_from_the_end(site, capsys) -> None:  # noqa: ANN001
    """A ledger cut short is still a valid chain; the head hash the board wrote down earlier says it was cut."""
    assert site_agent(["ledger", "show", "--site-dir", str(site.root)]) == 0
    shown = capsys.readouterr().out
    noted = re.search(r"head \(last entry hash\): ([0-9a-f]{64})", shown).group(1)
    assert noted == ledger.head(site.ledger_path)
    ledger.append(site.ledger_path, site.private_key(), "refusal", {"reason": "a later entry"})
    verify = ["ledger", "verify", "--site-dir", str(site.root), "--expect-head"]
    assert site_agent([*verify, noted]) == 0  # grown since: fine
    assert "is entry 5; 1 entry was added since" in capsys.readouterr().out
    assert site_agent([*verify, noted[:16]]) == 0  # the first 16 hex digits are enough
    write(site, lines(site)[:3])  # entries 4.. cut off: the chain that is left verifies on its own
    assert site_agent(["ledger", "verify", "--site-dir", str(site.root)]) == 0
    capsys.readouterr()
    assert site_agent([*verify, noted]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "entries were cut off the end" in err[0]
    assert site_agent([*verify, "not-a-hash"]) == 1
