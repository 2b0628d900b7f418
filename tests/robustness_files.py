"""Damaged input files for the robustness tests and the survey ``benchmarks/robustness.py``.

XTC frames (more than 9 atoms) are laid out as XDR, big-endian (the GROMACS ``xdrfile`` library):
bytes 0-3 magic number 1995, 4-7 atoms, 8-11 step, 12-15 time, 16-51 box, 52-55 atoms again,
56-59 precision, 60-71 minimum integer coordinates, 72-83 maximum ones, 84-87 the first small-
integer bit size index, 88-91 the byte count of the compressed coordinates, then those bytes,
padded to a multiple of 4. The damaged files below change one field of one frame of a good file.
"""

from __future__ import annotations

import os
import shutil
import struct

import numpy as np

#: the fields of an XTC frame header: name -> (byte offset, struct format)
FIELDS = {"magic": (0, ">i"), "atoms": (4, ">i"), "atoms_again": (52, ">i"), "precision": (56, ">f"),
          "minint": (60, ">3i"), "maxint": (72, ">3i"), "smallidx": (84, ">i"), "nbytes": (88, ">i")}


def frame_offsets(data):
    """Byte offset of every frame of XTC bytes (by the byte counts of the headers)."""
    offsets, off = [], 0
    while off + 92 <= len(data):
        offsets.append(off)
        nbytes = struct.unpack(">i", data[off + 88:off + 92])[0]
        off += 92 + 4 * ((nbytes + 3) // 4)
    return offsets


def short_xtc(topology, trajectory, out, n_frames):
    """The first ``n_frames`` frames of an XTC file, byte for byte."""
    with open(trajectory, "rb") as fh:
        data = fh.read()
    offsets = frame_offsets(data) + [len(data)]
    with open(out, "wb") as fh:
        fh.write(data[:offsets[min(n_frames, len(offsets) - 1)]])
    return out


def set_field(data, frame, name, value):
    """XTC bytes with one header field of one frame replaced."""
    data = bytearray(data)
    off = frame_offsets(bytes(data))[frame] + FIELDS[name][0]
    fmt = FIELDS[name][1]
    packed = struct.pack(fmt, *value) if isinstance(value, (tuple, list)) else struct.pack(fmt, value)
    data[off:off + len(packed)] = packed
    return bytes(data)


def _variant(change):
    def make(src, dst):
        with open(src, "rb") as fh:
            data = fh.read()
        with open(dst, "wb") as fh:
            fh.write(change(data))
        return dst
    return make


def _garble(frame):
    def change(data):
        data = bytearray(data)
        off = frame_offsets(bytes(data))[frame]
        nbytes = struct.unpack(">i", data[off + 88:off + 92])[0]
        rng = np.random.default_rng(7)
        data[off + 92:off + 92 + nbytes] = rng.integers(0, 256, nbytes, dtype=np.uint8).tobytes()
        return bytes(data)
    return change


def damaged_xtc_variants():
    """``{label: make(src, dst)}``: XTC files damaged in one field of one frame (frame 0, where
    MDAnalysis reads it when the file is opened, or frame 50 of 100, met during the pass)."""
    int_min = -2 ** 31
    return {
        "with a bad magic number in frame 50": _variant(lambda d: set_field(d, 50, "magic", 1996)),
        "with another atom count in frame 50": _variant(lambda d: set_field(d, 50, "atoms", 601)),
        "whose frame 0 has overflowed sizes (NaN written)": _variant(
            lambda d: set_field(d, 0, "minint", (int_min, int_min, int_min))),
        "whose frame 50 has overflowed sizes (NaN written)": _variant(
            lambda d: set_field(d, 50, "minint", (int_min, -5, -5))),
        "whose frame 50 has its maximum below its minimum": _variant(
            lambda d: set_field(d, 50, "maxint", (-1000, -1000, -1000))),
        "whose frame 50 has a small-integer size index out of range": _variant(
            lambda d: set_field(d, 50, "smallidx", 200)),
        "whose frame 50 claims 2 GB of coordinates": _variant(lambda d: set_field(d, 50, "nbytes", 2 ** 31 - 8)),
        "whose frame 50 has a negative byte count": _variant(lambda d: set_field(d, 50, "nbytes", -4)),
        "whose frame 50 has precision 0": _variant(lambda d: set_field(d, 50, "precision", 0.0)),
        "whose frame 50 has a garbled bit stream": _variant(_garble(50)),
        "whose frame 0 has a garbled bit stream": _variant(_garble(0)),
    }


def nan_overflow_xtc(src, dst, frame=10):
    """An XTC as a writer that met a NaN coordinate leaves it: the conversion of NaN to an integer
    gives the smallest integer, which becomes the frame's minimum (the sizes overflow). MDAnalysis'
    own reader corrupts its heap on such a frame."""
    int_min = -2 ** 31
    return _variant(lambda d: set_field(d, frame, "minint", (int_min, int_min, int_min)))(src, dst)


def cut_mid_frame(path, fraction=0.5):
    """Cut an XTC file in the middle of its last frame (a run stopped while writing)."""
    with open(path, "rb") as fh:
        data = fh.read()
    offsets = frame_offsets(data)
    last = offsets[-1]
    keep = last + int((len(data) - last) * fraction)
    with open(path, "wb") as fh:
        fh.write(data[:keep])
    return len(offsets) - 1


# ------------------------------------------------------------------------------------------------
# helpers of the robustness tests
# ------------------------------------------------------------------------------------------------
def copy_contents(src_folder, dest_folder):
    """Copy every file and folder of ``src_folder`` into ``dest_folder``."""
    for name in os.listdir(src_folder):
        src = os.path.join(src_folder, name)
        (shutil.copytree if os.path.isdir(src) else shutil.copy)(src, os.path.join(dest_folder, name))


def working_copy(base, tmp_path, monkeypatch):
    """A fresh copy of the inputs and results in ``base``, made the current folder (the ``work``
    fixture of the robustness tests)."""
    copy_contents(base, tmp_path)
    monkeypatch.chdir(tmp_path)
    return tmp_path


def leftovers(folder):
    """Staging or replaced folders left in ``folder`` (none may survive a run)."""
    return [n for n in os.listdir(folder) if ".partial-" in n or ".old-" in n]


def refused(capsys, argv, *fragments):
    """Run ``argv``; it must end with exactly one error line (exit 2), no traceback."""
    from dihedra.cli import main

    capsys.readouterr()
    code = main([str(a) for a in argv])
    err = capsys.readouterr().err
    lines = [line for line in err.strip().splitlines() if line.startswith("dihedra: error:")]
    assert code == 2 and len(lines) == 1, err
    assert "Traceback" not in err and "Exception ignored" not in err, err
    for f in fragments:
        assert f in lines[0], lines[0]
    return lines[0]
