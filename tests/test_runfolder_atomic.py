"""manifest.json and end.json are all-or-nothing.

Expectation (POSIX rename(2)): renaming over an existing name replaces it atomically, so
a reader sees the old file or the new one, never a mix; a write that fails before the
rename leaves the old state and no temp file behind.
"""
import errno
import json

import pytest

from sequencer import runfolder


class FailAfter(runfolder.FileOps):
    """Writes ``budget`` bytes, then the disk is full."""

    def __init__(self, budget):
        self.budget = budget

    def write(self, fd, data):
        if self.budget <= 0:
            raise OSError(errno.ENOSPC, "No space left on device")
        n = min(len(data), self.budget)
        self.budget -= n
        return super().write(fd, bytes(data[:n]))


def test_end_record_written_whole_or_not_at_all(tmp_path):
    folder = runfolder.create_run_folder(tmp_path, "KL-T03 atomic")
    with pytest.raises(OSError):
        runfolder.write_end(folder, "completed", 0, "plan finished", True, ops=FailAfter(20))
    assert not (folder / runfolder.END_FILE).exists()
    assert list(folder.iterdir()) == []                    # the temp file went too
    rf = runfolder.RunFolder(folder)
    assert rf.end is None and rf.outcome == "incomplete"
    runfolder.write_end(folder, "completed", 0, "plan finished", True, summary={"samples": 3})
    assert rf.end["outcome"] == "completed" and rf.end["summary"] == {"samples": 3}


def test_a_failed_rewrite_keeps_the_previous_manifest(tmp_path):
    folder = runfolder.create_run_folder(tmp_path, "KL-T03 atomic")
    first = runfolder.write_manifest(folder, {"protocol": {"name": "atomic"}, "seed": 1})
    with pytest.raises(OSError):
        runfolder.write_manifest(folder, {"protocol": {"name": "atomic"}, "seed": 2},
                                 ops=FailAfter(50))
    on_disk = json.loads((folder / runfolder.MANIFEST_FILE).read_text())
    assert on_disk["seed"] == 1 and on_disk["schema"] == runfolder.SCHEMA_VERSION
    assert on_disk == json.loads(runfolder.dumps(first))
    assert [p.name for p in folder.iterdir()] == [runfolder.MANIFEST_FILE]


def test_inputs_are_byte_copies_with_their_hashes(tmp_path):
    # sha256 of b"abc" is ba7816bf...15ad (FIPS 180-2, appendix B.1)
    src = tmp_path / "dialect.yaml"
    src.write_bytes(b"abc")
    proto = tmp_path / "p.yaml"
    proto.write_bytes("name: first light\n# Kestrel Lane, stand-B \u00b5A\n".encode())
    folder = runfolder.create_run_folder(tmp_path / "runs", "first light")
    copies = runfolder.copy_inputs(folder, protocol=proto, dialects=[src])
    assert copies["dialects/dialect.yaml"]["sha256"] == \
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert (folder / "protocol.yaml").read_bytes() == proto.read_bytes()
    assert copies["protocol.yaml"]["sha256"] == runfolder.sha256_file(folder / "protocol.yaml")
