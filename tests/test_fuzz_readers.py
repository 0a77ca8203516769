"""A seeded fuzz of the readers: truncated and bit-flipped copies of valid files of every format.

Every case must end in a clean read or a named error (a ``WarmstartError`` whose message names the
file), within a time limit, with a voxel size that is positive and finite or unknown: never a
raw library exception, a hang or a nonsense voxel size. The valid files are written in the test
with each format's own library (tifffile, mrcfile, numpy, Pillow, pydicom from its shipped
CT_small.dcm, zarr); the damage is seeded, so a failing case can be replayed by its id.
"""
from __future__ import annotations

import json
import math
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from conftest import textured

CASES_PER_FORMAT = 72  # 8 formats x 72 = 576 cases
TIME_LIMIT_S = 10


def _valid_sources(root: Path) -> dict[str, Path]:
    import mrcfile
    import tifffile
    import zarr
    from PIL import Image

    from conftest import write_dicom_series

    root.mkdir(parents=True)
    out = {}
    vol = textured(shape=(6, 48, 48), dtype=np.uint16)
    out["tiff"] = root / "stack.tif"
    tifffile.imwrite(out["tiff"], vol, imagej=True, resolution=(1 / 0.8, 1 / 0.8), metadata={"spacing": 2.0, "unit": "um"})
    out["ome-tiff"] = root / "stack.ome.tif"
    tifffile.imwrite(out["ome-tiff"], vol, metadata={"axes": "ZYX", "PhysicalSizeX": 0.5, "PhysicalSizeY": 0.5})
    out["mrc"] = root / "tomo.mrc"
    with mrcfile.new(out["mrc"]) as m:
        m.set_data(vol.astype(np.float32))
        m.voxel_size = 12.0
    out["npy"] = root / "v.npy"
    np.save(out["npy"], vol)
    out["png-slices"] = root / "slices"
    out["png-slices"].mkdir()
    for i, sl in enumerate(textured(shape=(4, 40, 40), dtype=np.uint8, lo=5, hi=250)):
        Image.fromarray(sl).save(out["png-slices"] / f"s_{i:03d}.png")
    out["dicom"] = root / "ct"
    write_dicom_series(out["dicom"], np.zeros((4, 32, 32), np.float32) + np.arange(32) * 5.0 - 100)
    out["zarr"] = root / "a.zarr"
    arr = zarr.create_array(str(out["zarr"]), shape=vol.shape, dtype=vol.dtype, chunks=(3, 24, 24))
    arr[:] = vol
    out["zarr-v2"] = root / "b.zarr"
    arr = zarr.create_array(str(out["zarr-v2"]), shape=vol.shape, dtype=vol.dtype, chunks=(3, 24, 24), zarr_format=2)
    arr[:] = vol
    return out


def _files_of(path: Path) -> list[Path]:
    return sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]


def _damaged_copies(fmt: str, src: Path, root: Path, n: int) -> list[tuple[str, Path]]:
    """``n`` seeded copies: half truncated at a random length, half with 1-16 random bytes flipped
    (header bytes chosen as often as data bytes); for folders, one file of the copy is damaged."""
    rng = np.random.default_rng([abs(hash(fmt)) % (2**31), 7])
    cases = []
    for k in range(n):
        case = root / f"{fmt}-{k:03d}"
        if src.is_dir():
            shutil.copytree(src, case / src.name)
        else:
            case.mkdir(parents=True)
            shutil.copy(src, case / src.name)
        target = case / src.name
        files = _files_of(target)
        victim = files[int(rng.integers(len(files)))]
        data = bytearray(victim.read_bytes())
        if k % 2 == 0 and len(data) > 1:
            del data[int(rng.integers(0, len(data))):]
            how = "truncated"
        elif data:
            for _ in range(int(rng.integers(1, 17))):
                near_start = rng.random() < 0.5
                i = int(rng.integers(0, min(len(data), 512))) if near_start else int(rng.integers(0, len(data)))
                data[i] ^= 1 << int(rng.integers(8))
            how = "flipped"
        else:
            how = "empty"
        victim.write_bytes(bytes(data))
        cases.append((f"{fmt}-{k:03d}-{how}-{victim.name}", target))
    return cases


# The child process reads every case of one format under an alarm and reports one line per case.
_CHILD = r"""
import json, math, signal, sys, warnings
warnings.simplefilter("ignore")
from warmstart.errors import WarmstartError
from warmstart.volumes import discover, open_volume

class TimeUp(Exception):
    pass

def alarm(*_):
    raise TimeUp()

signal.signal(signal.SIGALRM, alarm)
for line in sys.stdin:
    case_id, path = json.loads(line)
    signal.alarm(int(sys.argv[1]))
    try:
        found, _ = discover(path)
        if not found:
            out = {"result": "nothing found"}
        else:
            with open_volume(found[0]) as vol:
                block = vol.read((slice(0, min(2, vol.shape[0])), slice(0, min(64, vol.shape[1])), slice(0, min(64, vol.shape[2]))))
                vs = [None if v is None else float(v) for v in vol.voxel_size_um]
            out = {"result": "ok", "voxel": vs, "shape": list(block.shape)}
    except TimeUp:
        out = {"result": "hang"}
    except WarmstartError as err:
        out = {"result": "named error", "names_file": str(path).split("/")[-1] in str(err) or str(path) in str(err),
               "message": str(err)[:300]}
    except BaseException as err:
        out = {"result": "raw exception", "message": f"{type(err).__name__}: {err}"[:300]}
    finally:
        signal.alarm(0)
    print(json.dumps([case_id, out]), flush=True)
"""


def test_damaged_files_of_every_format_end_cleanly(tmp_path):
    sources = _valid_sources(tmp_path / "valid")
    cases = []
    for fmt, src in sources.items():
        cases += _damaged_copies(fmt, src, tmp_path / "damaged", CASES_PER_FORMAT)
    assert len(cases) >= 500
    feed = "".join(json.dumps([cid, str(p)]) + "\n" for cid, p in cases)
    proc = subprocess.run([sys.executable, "-c", _CHILD, str(TIME_LIMIT_S)], input=feed, capture_output=True, text=True,
                          timeout=TIME_LIMIT_S * len(cases) + 60)
    results = dict(json.loads(line) for line in proc.stdout.splitlines() if line.startswith("["))
    assert len(results) == len(cases), proc.stderr[-2000:]
    bad = {}
    for cid, r in results.items():
        if r["result"] in ("raw exception", "hang"):
            bad[cid] = r
        elif r["result"] == "named error" and not r["names_file"]:
            bad[cid] = r
        elif r["result"] == "ok" and not all(v is None or (math.isfinite(v) and v > 0) for v in r["voxel"]):
            bad[cid] = r
    tally = {k: sum(1 for r in results.values() if r["result"] == k) for k in ("ok", "named error", "nothing found")}
    assert not bad, f"{len(bad)} of {len(results)} cases ended badly ({tally}): " + json.dumps(dict(list(bad.items())[:8]), indent=1)
