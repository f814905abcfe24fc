"""The safetensors header reader against corrupt and hostile files: every one a clean FactorizeError.

The layout rules come from the open safetensors format (8-byte little-endian header length, a JSON object of
entries {dtype, shape, data_offsets}, optional string-to-string __metadata__); the reference reader
(safetensors.safe_open) is used to confirm that what we accept, it accepts too.
"""

from __future__ import annotations

import contextlib
import json
import os
import struct
import subprocess
import sys

import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from safetensors import safe_open

from factorize.errors import FactorizeError
from factorize.storage import read_header, write_safetensors


def _file(tmp_path, header: bytes | str, data: bytes = b"", name="f.safetensors"):
    raw = header.encode() if isinstance(header, str) else header
    p = tmp_path / name
    p.write_bytes(struct.pack("<Q", len(raw)) + raw + data)
    return p


@pytest.mark.parametrize(
    ("header", "match"),
    [
        ('{"w": {"dtype": "F32", "shape": [2], "data_offsets": [0, Infinity]}}', "not valid UTF-8 JSON"),
        ('{"w": {"dtype": "F32", "shape": [NaN], "data_offsets": [0, 8]}}', "not valid UTF-8 JSON"),
        ('{"w": {"dtype": "F32", "shape": [1e400], "data_offsets": [0, 8]}}', "not a list of integers"),
        ('{"w": {"dtype": "F32", "shape": [true, 2], "data_offsets": [0, 8]}}', "not a list of integers"),
        ('{"w": {"dtype": "F32", "shape": 2, "data_offsets": [0, 8]}}', "not a list of integers"),
        ('{"w": {"dtype": "F32", "shape": [-1], "data_offsets": [0, 8]}}', "not a list of integers"),
        ('{"w": {"dtype": "F32", "shape": [0, 1099511627777], "data_offsets": [0, 0]}}', "not a list of integers"),
        ('{"w": {"dtype": "F32", "shape": [1048576, 1048576, 1048576], "data_offsets": [0, 0]}}', "elements"),
        ('{"w": {"dtype": "C64", "shape": [2], "data_offsets": [0, 16]}}', "C64 is not supported"),
        ('{"w": {"dtype": "F32", "shape": [2], "data_offsets": [8, 0]}}', "not integers with 0 <= start <= end"),
        ('{"w": {"dtype": "F32", "shape": [2], "data_offsets": [0.0, 8.0]}}', "not integers"),
        ('{"w": {"dtype": "F32", "shape": [2]}}', "entry is not"),
        ('{"w": 3}', "entry is not"),
        ('{"__metadata__": {"a": 1}}', "__metadata__ must map strings to strings"),
        ('[1, 2]', "not a JSON object"),
        ("[" * 200_000 + "]" * 200_000, "nested too deeply|not valid"),
        ('{"w\\u001b[31m": {"dtype": "X", "shape": [2], "data_offsets": [0, 8]}}', r"w\\x1b\[31m"),
    ],
)
def test_bad_headers_are_clean_errors(tmp_path, header, match):
    p = _file(tmp_path, header, b"\0" * 16)
    with pytest.raises(FactorizeError, match=match) as err:
        read_header(p)
    assert "\x1b" not in str(err.value)  # control characters never reach the terminal


def _overlapping(tmp_path):
    """Two 4 x 4 float32 tensors written by the reference writer, then the header edited by hand so that the second
    one's bytes [32, 96) overlap the first's [0, 64) (same header length, data unchanged)."""
    from safetensors.torch import save_file

    p = tmp_path / "overlap.safetensors"
    save_file({"a.weight": torch.randn(4, 4), "b.weight": torch.randn(4, 4)}, str(p))
    blob = p.read_bytes()
    (n,) = struct.unpack("<Q", blob[:8])
    header = json.loads(blob[8:8 + n])
    header["b.weight"]["data_offsets"] = [32, 96]
    text = json.dumps(header, separators=(",", ":")).encode()
    assert len(text) <= n
    p.write_bytes(struct.pack("<Q", n) + text.ljust(n) + blob[8 + n:])
    return p


def test_overlapping_tensors_are_a_factorize_error_naming_the_file(tmp_path):
    from safetensors import SafetensorError
    from safetensors.torch import load_file

    import factorize
    from factorize.storage import read_safetensors

    p = _overlapping(tmp_path)
    with pytest.raises(SafetensorError):  # reference: the safetensors library refuses the file itself
        load_file(str(p))
    for read in (read_header, read_safetensors, lambda q: factorize.load(torch.nn.Linear(4, 4), q)):
        with pytest.raises(FactorizeError, match="tensors share bytes") as err:
            read(p)
        assert str(p) in str(err.value) and "a.weight [0, 64) and b.weight [32, 96) overlap" in err.value.problems
        assert "save it again" in err.value.fix


def test_a_good_file_round_trips_through_the_reference_reader(tmp_path):
    tensors = {"b": torch.arange(6, dtype=torch.float32).reshape(2, 3), "a": torch.ones(4, dtype=torch.bfloat16)}
    p = tmp_path / "ok.safetensors"
    write_safetensors(p, tensors, {"k": "v"})
    h = read_header(p)
    assert h.metadata == {"k": "v"} and set(h.tensors) == {"a", "b"}
    with safe_open(str(p), "pt") as f:  # reference: the safetensors library's own reader
        for k, v in tensors.items():
            assert torch.equal(f.get_tensor(k), v)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=300), cut=st.integers(min_value=0, max_value=400))
def test_fuzz_random_and_mutated_files_never_escape_as_other_errors(tmp_path, data, cut):
    # random bytes, and a valid file with random bytes spliced in: either parsed or a FactorizeError, nothing else
    p = tmp_path / "fuzz.safetensors"
    p.write_bytes(data)
    with contextlib.suppress(FactorizeError):
        read_header(p)
    good = tmp_path / "good.safetensors"
    write_safetensors(good, {"w": torch.zeros(3, 2)}, {"factorize.plan": json.dumps({"sites": {}})})
    raw = good.read_bytes()
    cut = min(cut, len(raw))
    p.write_bytes(raw[:cut] + data[:16] + raw[cut + len(data[:16]):])
    with contextlib.suppress(FactorizeError):
        read_header(p)


def test_two_writers_racing_for_one_path_exactly_one_wins(tmp_path):
    # without force the final name is claimed exclusively: the second publish must fail, the first file stays
    from factorize.storage import create_temp, publish

    final = tmp_path / "out.safetensors"
    temps = []
    for payload in (b"first", b"second"):
        tmp, fd = create_temp(final)
        os.write(fd, payload)
        os.close(fd)
        temps.append(tmp)
    publish(temps[0], final, force=False)
    with pytest.raises(FactorizeError, match="appeared while writing"):
        publish(temps[1], final, force=False)
    assert final.read_bytes() == b"first"
    publish(temps[1], final, force=True)  # force replaces
    assert final.read_bytes() == b"second"


def test_leftovers_of_a_killed_writer_are_removed_by_the_next_run(tmp_path):
    from factorize.storage import TEMP_SUFFIX, create_temp, remove_stale_temps

    final = tmp_path / "m.safetensors"
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    stale = tmp_path / f".m.safetensors.{int(dead.stdout)}-abcdef{TEMP_SUFFIX}"  # that process has exited
    stale.write_bytes(b"x" * 100)
    live = tmp_path / f".m.safetensors.{os.getpid()}-abcdef{TEMP_SUFFIX}"  # this process: still writing
    live.write_bytes(b"y")
    tmp, fd = create_temp(final)  # the next run's first temp file clears the dead writer's leftover
    os.close(fd)
    assert not stale.exists() and live.exists() and tmp.name.endswith(TEMP_SUFFIX)
    assert remove_stale_temps(tmp_path) == []  # nothing else is stale


def test_read_tensor_matches_the_reference_reader(tmp_path):
    # safetensors' own load_file is the reference
    from safetensors.torch import load_file

    from factorize.storage import read_tensor

    path = tmp_path / "t.safetensors"
    write_safetensors(path, {"a": torch.arange(6.0).reshape(2, 3), "b": torch.ones(4, dtype=torch.bfloat16)})
    ref = load_file(str(path))
    for name in ("a", "b"):
        got = read_tensor(path, name)
        assert got.dtype == ref[name].dtype and torch.equal(got, ref[name])


def test_return_freed_memory_sets_glibc_thresholds():
    # glibc's mallopt(3) returns 1 on success; elsewhere the call reports False and changes nothing
    import platform

    from factorize.storage.proc import return_freed_memory

    result = return_freed_memory()
    if platform.system() == "Linux" and platform.libc_ver()[0] == "glibc":
        assert result is True
    else:
        assert result is False
