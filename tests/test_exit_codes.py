"""Exit codes and one-line messages at the edges: unreadable input, a closed output pipe, file-unsafe design names,
a full disk, a memory budget.

Common practice (no source): a command-line tool reports bad input or a failed environment in one line with a
documented exit code and never as an internal error (exit code 70) or a traceback.
"""

import copy
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import hostile_corpus as hc
from metalay.cli import main

from conftest import SMALL_DESIGN, write_toml

ROOT = Path(__file__).resolve().parent.parent


def _one_line(capsys) -> str:
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "Traceback" not in err, err
    return err


def _gds(tmp_path, name="m.gds", cells=1) -> Path:
    p = tmp_path / name
    p.write_bytes(hc.gds([(f"C{k}", [hc.boundary(1, 0, hc.FIN)]) for k in range(cells)]))
    return p


def test_permission_denied_is_unreadable_not_internal(tmp_path, capsys, monkeypatch):
    import metalay.io.gdsread as G

    mask = _gds(tmp_path)
    if os.geteuid() != 0:
        mask.chmod(0)
    else:  # root may read anything: refuse the open the way the kernel refuses it to a user without permission
        real_open = open

        def deny(path, *args, **kwargs):
            if Path(path) == mask:
                raise PermissionError(13, "Permission denied", str(path))
            return real_open(path, *args, **kwargs)

        monkeypatch.setattr(G, "open", deny, raising=False)
    assert main(["info", str(mask)]) == 3
    assert "Permission denied" in _one_line(capsys)
    assert main(["rules", "check", str(mask), "--rules", "tio2-ebl-example", "-o", str(tmp_path / "r")]) == 3
    assert "Permission denied" in _one_line(capsys)


def test_closed_output_pipe_ends_quietly(tmp_path):
    # 3000 structures: `metalay info` prints far more than a pipe holds, so it writes after the reader has gone
    mask = _gds(tmp_path, cells=3000)
    proc = subprocess.Popen([sys.executable, "-m", "metalay.cli", "info", str(mask)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, cwd=ROOT)
    first = proc.stdout.readline()
    proc.stdout.close()  # what `| head -1` does
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 141
    assert first.startswith(b"file") and err == ""


@pytest.mark.parametrize("name", ["vortex-\u00e9", ".", "..", ".hidden", "a b", "x/y"])
def test_design_names_are_ascii_and_file_safe(tmp_path, capsys, name):
    d = copy.deepcopy(SMALL_DESIGN)
    d["design"]["name"] = name
    design = write_toml(tmp_path / "d.toml", d)
    assert main(["compile", str(design), "-o", str(tmp_path / "o"), "--quiet"]) == 2
    err = _one_line(capsys)
    assert "design.name" in err and "ASCII" in err
    assert not (tmp_path / "o").exists()


class _ShortWrites:
    """A gdstk library whose OASIS writes stop half way without an error, as gdstk does on a full disk."""

    def __init__(self, lib):
        self.lib = lib

    def write_oas(self, path, **kwargs):
        self.lib.write_oas(path, **kwargs)
        size = os.path.getsize(path)
        with open(path, "rb+") as fh:
            fh.truncate(size // 2)

    def write_gds(self, path, **kwargs):
        self.lib.write_gds(path, **kwargs)


def test_full_disk_while_writing_oasis_is_named(tmp_path, capsys, monkeypatch):
    import errno

    import metalay.io.oasis_write as O

    d = copy.deepcopy(SMALL_DESIGN)
    d["mask"]["formats"] = ["oas"]
    design = write_toml(tmp_path / "d.toml", d)
    real = O.OasisStream._write

    def short_write(self, data):  # the disk fills up after the first 2 kB of the OASIS stream
        if self._pos + memoryview(data).nbytes > 2048:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        real(self, data)

    monkeypatch.setattr(O.OasisStream, "_write", short_write)
    assert main(["compile", str(design), "-o", str(tmp_path / "o"), "--quiet"]) == 2
    err = _one_line(capsys)
    assert "disk is full" in err and "cannot read" not in err and "OASIS byte" not in err
    assert not (tmp_path / "o").exists() and sorted(p.name for p in tmp_path.iterdir()) == ["d.toml"]


def test_short_gdstk_write_is_refused(tmp_path, monkeypatch):
    # gdstk (still used by the benchmarks as a baseline) does not report a failed write: a short file is caught
    from collections import namedtuple

    import metalay.io.writer as W
    from metalay.errors import OutputError

    lib = _ShortWrites(W.build_gdstk_flat("TOP", [(1, 0, np.array([[0, 0], [10, 0], [0, 10]]),
                                                   np.array([[0, 0], [100, 0]]))], [], db_unit_nm=1.0))
    usage = namedtuple("usage", "total used free")
    monkeypatch.setattr(W.shutil, "disk_usage", lambda p: usage(1 << 30, 1 << 30, 0))
    with pytest.raises(OSError) as exc:
        W.write_gdstk_library(lib, tmp_path / "m.oas", "oas")
    assert "No space" in str(exc.value)
    monkeypatch.setattr(W.shutil, "disk_usage", lambda p: usage(1 << 40, 0, 1 << 40))
    with pytest.raises(OutputError, match="incomplete OASIS file"):
        W.write_gdstk_library(lib, tmp_path / "m.oas", "oas")
    assert sorted(p.name for p in tmp_path.iterdir()) == []


def test_full_disk_on_a_real_small_file_system(tmp_path):
    # a 1 MB tmpfs in a user and mount namespace (where the kernel allows one): the real ENOSPC path
    if shutil.which("unshare") is None or subprocess.run(["unshare", "-rm", "true"], capture_output=True).returncode:
        pytest.skip("no user namespaces here to mount a small file system (the monkeypatched test covers it)")
    d = copy.deepcopy(SMALL_DESIGN)
    d["aperture"]["diameter_um"] = 60.0
    design = write_toml(tmp_path / "d.toml", d)
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    for formats in (["oas"], ["gds", "oas"]):
        d["mask"]["formats"] = formats
        write_toml(design, d)
        script = (f"mount -t tmpfs -o size=1m tmpfs {mnt} && head -c 1000000 /dev/zero > {mnt}/filler; "
                  f"{sys.executable} -m metalay.cli compile {design} -o {mnt}/out --quiet; echo exit=$?; ls -a {mnt}")
        proc = subprocess.run(["unshare", "-rm", "sh", "-c", script], capture_output=True, text=True, cwd=ROOT,
                              timeout=300)
        assert "exit=2" in proc.stdout, (proc.stdout, proc.stderr)
        err = proc.stderr.strip()
        # the streamed OASIS fails while writing (ENOSPC, named); the flat GDSII's size is known before writing,
        # so that compile is refused up front
        expected = "the disk is full" if formats == ["oas"] else "but the disk has"
        assert expected in err and "\n" not in err, err
        assert proc.stdout.split("exit=2")[1].split() == [".", "..", "filler"]  # nothing left behind


def test_memory_budget_option_refuses_a_fan_out_naming_the_counts(tmp_path, capsys):
    mask = tmp_path / "aref.gds"
    mask.write_bytes(hc.gds([("A", [hc.boundary(1, 0, hc.FIN)]),
                             ("T", [hc.aref("A", 1000, 1000, (0, 0), (300000, 0), (0, 300000))])]))
    assert main(["info", str(mask), "--max-memory", "100M"]) == 3
    err = _one_line(capsys)
    assert "1000000 polygons" in err and "memory budget of 100 MB" in err
    assert main(["info", str(mask), "--max-memory", "300M"]) == 0  # 248 MB estimated: within
    capsys.readouterr()
    with pytest.raises(SystemExit) as exc:
        main(["info", str(mask), "--max-memory", "lots"])
    assert exc.value.code == 2 and "4GiB" in capsys.readouterr().err

