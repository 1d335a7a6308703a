"""nenv.media.files on its own: output paths checked before any work, and files complete or absent."""

from __future__ import annotations

import os
import stat
import types

import pytest

from nenv.errors import OutputError
from nenv.media import files
from tests.conftest import open_descriptors


def _leftovers(folder) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if ".part" in p.name)


def test_an_output_path_needs_a_known_suffix_an_existing_folder_and_no_folder_of_its_name(tmp_path):
    assert files.check_output(tmp_path / "a.wav", suffixes=(".wav", ".flac")) == tmp_path / "a.wav"
    assert files.check_output(str(tmp_path / "B.FLAC"), suffixes=(".wav", ".flac")) == tmp_path / "B.FLAC"  # any case
    with pytest.raises(OutputError, match=r"the file name must end in \.wav or \.flac"):
        files.check_output(tmp_path / "a.mp3", suffixes=(".wav", ".flac"))
    with pytest.raises(OutputError, match="folder '.*nowhere' does not exist"):
        files.check_output(tmp_path / "nowhere" / "a.wav", suffixes=(".wav",))
    (tmp_path / "taken.wav").mkdir()
    with pytest.raises(OutputError, match="it is a folder"):
        files.check_output(tmp_path / "taken.wav", suffixes=(".wav",))


def test_an_output_folder_is_made_with_its_parents_only_when_asked(tmp_path):
    deep = tmp_path / "a" / "b" / "c"
    assert files.output_folder(deep, create=False) == deep and not (tmp_path / "a").exists()
    assert files.output_folder(deep) == deep and deep.is_dir()
    assert files.output_folder(str(deep)) == deep  # already there: fine
    (tmp_path / "plain").write_text("x")
    with pytest.raises(OutputError, match="^--report '.*plain' exists and is not a folder$"):
        files.output_folder(tmp_path / "plain", what="--report", create=False)
    with pytest.raises(OutputError, match="^cannot create --out '.*plain/sub': Not a directory$"):
        files.output_folder(tmp_path / "plain" / "sub")


def test_the_same_file_is_recognised_through_links_and_spellings(tmp_path, monkeypatch):
    a, b = tmp_path / "a.wav", tmp_path / "b.wav"
    a.write_bytes(b"1")
    b.write_bytes(b"1")
    os.symlink(a, tmp_path / "soft.wav")
    os.link(a, tmp_path / "hard.wav")
    assert files.same_path(a, tmp_path / "soft.wav") and files.same_path(tmp_path / "hard.wav", a)
    assert not files.same_path(a, b)  # equal contents, other files
    assert files.same_path(tmp_path / "new.wav", tmp_path / "x" / ".." / "new.wav")  # neither exists yet: the same path
    assert not files.same_path(tmp_path / "new.wav", tmp_path / "other.wav")
    assert not files.same_path(a, tmp_path / "new.wav")

    def unreadable(*_):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(files, "os", types.SimpleNamespace(path=types.SimpleNamespace(exists=os.path.exists, samefile=unreadable)))
    assert files.same_path(a, b) is False


def test_within_a_folder_means_the_folder_or_below_it_not_a_name_that_starts_alike(tmp_path):
    (tmp_path / "out" / "deep").mkdir(parents=True)
    (tmp_path / "outer").mkdir()
    os.symlink(tmp_path / "out" / "deep", tmp_path / "alias")
    assert files.is_within(tmp_path / "out", tmp_path / "out")
    assert files.is_within(tmp_path / "out" / "deep" / "x.wav", tmp_path / "out")
    assert files.is_within(tmp_path / "alias" / "x.wav", tmp_path / "out")  # links resolved
    assert not files.is_within(tmp_path / "outer" / "x.wav", tmp_path / "out")
    assert not files.is_within(tmp_path / "out", tmp_path / "out" / "deep")


def test_a_file_is_never_written_over_one_the_command_reads(tmp_path):
    src = tmp_path / "in.wav"
    src.write_bytes(b"1")
    files.check_distinct(tmp_path / "out.wav", what="the output", others={"the input": src, "the reference": None})
    with pytest.raises(OutputError, match=r"^the output '.*in\.wav' is the same file as the input '.*in\.wav': nenv never writes over"):
        files.check_distinct(src, what="the output", others={"the reference": None, "the input": src})


def test_an_atomic_output_appears_whole_with_the_usual_permissions_or_not_at_all(tmp_path):
    target = tmp_path / "out.txt"
    with files.atomic_output(target) as tmp:
        assert tmp.parent == tmp_path and tmp.name.startswith(".out.txt.") and tmp.name.endswith(".part.txt")
        tmp.write_text("whole")
        assert not target.exists()  # nothing at the target until the block ends
    assert target.read_text() == "whole" and _leftovers(tmp_path) == []
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~mask  # as a plain open() would make it, not mkstemp's 0o600
    for interruption in (RuntimeError("a failure"), KeyboardInterrupt()):
        with pytest.raises(type(interruption)):
            with files.atomic_output(target) as tmp:
                tmp.write_text("half")
                raise interruption
        assert target.read_text() == "whole" and _leftovers(tmp_path) == []
    with pytest.raises(OutputError, match=r"^cannot write '.*out\.txt': No space left on device$"):
        with files.atomic_output(target):
            raise OSError(28, "No space left on device")
    assert target.read_text() == "whole" and _leftovers(tmp_path) == []
    with pytest.raises(OutputError, match="folder '.*gone' does not exist"):
        with files.atomic_output(tmp_path / "gone" / "x.txt"):
            pass


def test_an_atomic_output_closes_its_temporary_files_descriptor(tmp_path):
    descriptors = open_descriptors()
    with files.atomic_output(tmp_path / "out.txt") as tmp:
        tmp.write_text("whole")
    assert open_descriptors() == descriptors  # a batch writes thousands of files


def test_text_is_written_whole_in_utf_8(tmp_path):
    files.write_text(tmp_path / "note.md", "Zürich, 8 kHz → 16 kHz\n")
    assert (tmp_path / "note.md").read_bytes() == "Zürich, 8 kHz → 16 kHz\n".encode("utf-8")
    assert _leftovers(tmp_path) == []
