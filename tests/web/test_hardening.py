"""Uploads that try the edges of the store: names the file system refuses, and the same bytes
arriving twice at once. Nothing stored may be lost and nothing half-written may stay behind."""

from __future__ import annotations

from actdoc.workspace import Workspace, intake
from tests.support.web import post_file

#: Linux file systems (ext4, tmpfs, xfs) cap one path component at 255 bytes (common practice:
#: NAME_MAX in <limits.h>); a CJK character takes 3 bytes in UTF-8.
NAME_MAX_BYTES = 255


def test_a_long_unicode_file_name_is_shortened_not_a_server_error(client, workspace,
                                                                  planted_dump):
    long_name = "漢" * 200 + ".h5"  # 603 bytes in UTF-8
    response = post_file(client, planted_dump, name=long_name)
    assert response.status_code == 201, response.get_json()
    stored = response.get_json()["name"]
    assert stored.endswith(".h5") and stored.startswith("漢")
    assert len(stored.encode("utf-8")) <= NAME_MAX_BYTES
    assert workspace.dump_path(workspace.get(response.get_json()["id"])).is_file()
    assert not list((workspace.root / "tmp").glob("upload-*"))  # the worker may be busy


def test_names_with_nul_dots_and_separators_stay_inside_the_workspace(tmp_path):
    store = Workspace(tmp_path / "ws")
    for name in ("a\x00b.h5", "..", "../..", "C:\\x\\..\\y.h5", "/", "\x7f"):
        spool = store.begin_upload(name)
        assert spool.path.parent == spool.folder
        assert spool.folder.parent == store.root / "tmp"
        assert "\x00" not in spool.name and "/" not in spool.name
        assert spool.name not in ("", ".", "..")
        spool.discard()


def test_stored_names_lose_c1_and_bidirectional_controls(client, workspace, planted_dump):
    """ECMA-48 (5th edition) section 5: C1 controls U+0080-U+009F include the 8-bit CSI
    (U+009B) and OSC (U+009D) that terminals obey like ESC [ and ESC ]; Unicode's bidirectional
    controls (U+202A-U+202E, U+2066-U+2069, U+200E/U+200F; CVE-2021-42574, "Trojan Source")
    make a name read differently from its bytes. None of them may reach a stored name."""
    from actdoc.escaping import CONTROL

    sent = "a\x9b31mb\x9d0;x\x07\u202egp.\u2066h5\u2069\x85c\u2028d\u200f.h5"
    assert intake.safe_file_name(sent) == "a31mb0;xgp.h5cd.h5"
    response = post_file(client, planted_dump, name=sent)
    assert response.status_code == 201, response.get_json()
    stored = response.get_json()["name"]
    assert stored == "a31mb0;xgp.h5cd.h5" and not CONTROL.search(stored)
    assert workspace.dump_path(workspace.get(response.get_json()["id"])).name == stored
    # Printable text beyond Latin-1 is kept as sent.
    assert intake.safe_file_name("模型 ünïcode.h5") == "模型 ünïcode.h5"


def test_the_same_bytes_uploaded_twice_at_once_keep_the_stored_file(tmp_path, planted_dump,
                                                                     monkeypatch):
    """Upload B's format is being sniffed while upload A of the same bytes is stored in full:
    A's file must survive B (B's answer is A's dump)."""
    store = Workspace(tmp_path / "ws")
    data = planted_dump.read_bytes()
    first, second = store.begin_upload("first.h5"), store.begin_upload("second.h5")
    for spool in (first, second):
        spool.write(data)
    real_sniff = intake.sniff_format
    stored = {}

    def sniff_while_the_other_upload_lands(path):
        if path == second.path and not stored:
            stored["record"], _ = store.adopt(first)
        return real_sniff(path)

    monkeypatch.setattr(intake, "sniff_format", sniff_while_the_other_upload_lands)
    record, created = store.adopt(second)
    assert not created and record == stored["record"] and record.name == "first.h5"
    assert store.dump_path(record).read_bytes() == data
    assert [r.id for r in store.list()] == [record.id]
    assert list((store.root / "tmp").iterdir()) == []


def test_the_server_log_shows_a_decoded_path_with_its_escapes_visible(client, workspace,
                                                                       monkeypatch, caplog):
    """The request path arrives URL-decoded, so ``%1b]0;x%07`` would reach the console as
    ECMA-48's OSC sequence (ESC ] ... BEL, which retitles a terminal window) and ``%9b`` as the
    8-bit CSI. The log of a failed request shows them as escapes and stays on one line."""
    import logging

    def broken(_dump_id):
        raise RuntimeError("planted failure")

    monkeypatch.setattr(workspace, "get", broken)
    with caplog.at_level(logging.ERROR, logger="actdoc.web.errors"):
        response = client.get("/dumps/a%1b]0;owned%07b%0a%c2%9b31m")
    assert response.status_code == 500
    [record] = [r for r in caplog.records if r.name == "actdoc.web.errors"]
    line = record.getMessage()
    assert line == "request GET /dumps/a\\x1b]0;owned\\x07b\\n\\x9b31m failed"
