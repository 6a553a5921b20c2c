"""Checkpoints: the file format, atomic replacement, restore, faults and SIGKILL.

Restored estimates are compared with numpy on the prefix of the stream that
the checkpoint says it holds (its observation count identifies the prefix).
"""

from __future__ import annotations

import errno
import logging
import math
import os
import random
import signal
import struct
import subprocess
import sys
import time

import numpy as np
import pytest
from harness import ROOT, Sigmad, free_port, value
from prometheus_client import CollectorRegistry

from daemon import checkpoint as cpmod
from daemon.checkpoint import (
    Checkpointer,
    CheckpointError,
    decode_checkpoint,
    encode_checkpoint,
    move_aside,
    read_checkpoint,
    write_atomically,
)
from daemon.client import Producer
from daemon.config import parse_config
from daemon.engine import Engine
from daemon.wire import encode
from estimators import Moments

NOW = 1.7e9

ENGINE_CONFIG = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:1"

[[stream]]
name = "lat"
topic = "lat.{svc}"
fields = ["ms"]
mixture = { components = 2, warmup = 10 }

[[stream]]
name = "pair"
topic = "px"
fields = ["a", "b"]
regression = { y = "b", x = ["a"] }
"""


def filled_engine(config: str = ENGINE_CONFIG) -> Engine:
    e = Engine(parse_config(config))
    rng = np.random.default_rng(3)
    for svc in ("api", "web"):
        e.ingest(f"lat.{svc}".encode(), encode({"ms": rng.lognormal(3, 0.5, 200)}), NOW)
    a = rng.normal(size=300)
    e.ingest(b"px", encode({"a": a, "b": 2 * a + rng.normal(size=300)}), NOW)
    e.flush(NOW)
    return e


# ------------------------------------------------------------------ the format
def test_round_trip_restores_equal_state(tmp_path):
    e = filled_engine()
    path = tmp_path / "s.state"
    write_atomically(path, encode_checkpoint(e.export_state(), [], NOW))
    cp = read_checkpoint(path)
    fresh = Engine(e.config)
    assert fresh.restore_state(cp.series, NOW) == []
    assert fresh.export_state() == e.export_state()
    assert cp.written_at == NOW


@pytest.mark.parametrize("damage", ["flip", "truncate", "magic", "version", "empty"])
def test_damaged_files_are_refused_with_the_reason(damage):
    data = bytearray(encode_checkpoint(filled_engine().export_state(), [], NOW))
    if damage == "flip":
        data[len(data) // 2] ^= 0x40
    elif damage == "truncate":
        del data[-100:]
    elif damage == "magic":
        data[0:2] = b"PK"
    elif damage == "version":
        data[8] = 99
    else:
        data = bytearray()
    with pytest.raises(CheckpointError) as err:
        decode_checkpoint(bytes(data), "x.state")
    words = {"flip": "checksum", "truncate": "truncated", "magic": "magic",
             "version": "format version", "empty": "truncated"}[damage]
    assert words in str(err.value) and "x.state" in str(err.value)


def test_a_payload_claiming_a_huge_map_is_refused_at_the_header():
    # a valid header and checksum over a payload whose map32 header claims 2**31 - 1 entries
    payload = b"\xdf" + struct.pack(">I", 2**31 - 1) + b"\xa1k" * 4
    import hashlib

    data = cpmod._HEADER.pack(cpmod.MAGIC, 1, len(payload),
                              hashlib.sha256(payload).digest()) + payload
    with pytest.raises(CheckpointError, match="not valid msgpack"):
        decode_checkpoint(data)


def test_a_file_over_the_size_limit_is_not_read(tmp_path):
    path = tmp_path / "big.state"
    path.write_bytes(b"\0" * 5000)
    with pytest.raises(CheckpointError, match="exceeds the 4096-byte limit"):
        read_checkpoint(path, max_bytes=4096)


def test_move_aside_never_overwrites(tmp_path):
    a = tmp_path / "s.state"
    a.write_bytes(b"first")
    first = move_aside(a, NOW)
    a.write_bytes(b"second")
    second = move_aside(a, NOW)
    assert first != second
    assert first.read_bytes() == b"first" and second.read_bytes() == b"second"


def test_atomic_write_leaves_no_temporary_and_a_private_file(tmp_path):
    path = tmp_path / "s.state"
    write_atomically(path, b"one")
    write_atomically(path, b"two")
    assert path.read_bytes() == b"two"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.state"]
    assert (path.stat().st_mode & 0o777) == 0o600


# ------------------------------------------------------------------- restore
def test_changed_stream_is_dropped_with_a_warning_and_the_rest_restored(tmp_path, caplog):
    e = filled_engine()
    path = tmp_path / "s.state"
    write_atomically(path, encode_checkpoint(e.export_state(), [], NOW))
    changed = ENGINE_CONFIG.replace('fields = ["a", "b"]', 'fields = ["a", "b", "c"]')
    fresh = Engine(parse_config(changed))
    cpr = Checkpointer(str(path), 1.0, CollectorRegistry())
    with caplog.at_level(logging.WARNING, "sigmad.checkpoint"):
        cpr.restore(fresh, NOW, strict=False)
    assert {d["stream"] for d in fresh.export_state()} == {"lat"}
    assert len(fresh.export_state()) == 2
    assert any("pair" in r.message and "fields" in r.message for r in caplog.records)


def test_corrupt_checkpoint_is_moved_aside_counted_and_strict_refuses(tmp_path):
    path = tmp_path / "s.state"
    path.write_bytes(b"not a checkpoint at all, just junk" * 3)
    reg = CollectorRegistry()
    cpr = Checkpointer(str(path), 1.0, reg)
    e = Engine(parse_config(ENGINE_CONFIG))
    cpr.restore(e, NOW, strict=False)
    assert reg.get_sample_value("sigmad_checkpoint_restore_failures_total") == 1.0
    assert not path.exists()
    (aside,) = tmp_path.glob("s.state.corrupt-*")
    assert aside.read_bytes().startswith(b"not a checkpoint")
    path.write_bytes(b"junk again")
    with pytest.raises(CheckpointError, match="strict_restore"):
        Checkpointer(str(path), 1.0, CollectorRegistry()).restore(e, NOW, strict=True)
    assert len(list(tmp_path.glob("s.state.corrupt-*"))) == 2


def test_strict_restore_makes_the_cli_exit_2_with_one_sentence(tmp_path):
    (tmp_path / "s.state").write_bytes(b"junk")
    (tmp_path / "c.toml").write_text(
        f'[daemon]\nhttp = "127.0.0.1:{free_port()}"\nstate_file = "s.state"\n'
        'strict_restore = true\n' + ENGINE_CONFIG.replace("tcp://127.0.0.1:1",
                                                          f"tcp://127.0.0.1:{free_port()}"))
    r = subprocess.run([sys.executable, "-m", "daemon", "run", "--config", "c.toml"],
                       cwd=tmp_path, capture_output=True, text=True, timeout=30,
                       env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and "refusing to start" in r.stderr


def test_unchanged_series_are_not_serialised_again():
    e = filled_engine()
    cpr = Checkpointer("unused", 1.0, CollectorRegistry())
    first = cpr.collect(e)
    e.ingest(b"lat.api", encode({"ms": [10.0]}), NOW)
    e.flush(NOW)
    second = cpr.collect(e)
    same = [a is b for a, b in zip(first, second, strict=True)]
    assert same.count(False) == 1 and len(same) == 3


def test_a_failed_write_is_counted_and_keeps_the_old_file(tmp_path, monkeypatch):
    path = tmp_path / "s.state"
    e = filled_engine()
    reg = CollectorRegistry()
    cpr = Checkpointer(str(path), 1.0, reg)
    assert cpr.final(e, NOW)
    good = path.read_bytes()

    def full_disk(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(cpmod.os, "fsync", full_disk)
    assert not cpr._write(cpr.collect(e), [], NOW + 1, {})
    monkeypatch.undo()
    assert reg.get_sample_value("sigmad_checkpoint_failures_total") == 1.0
    assert path.read_bytes() == good
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.state"]


def test_inspect_prints_series_and_estimates(tmp_path):
    e = filled_engine()
    path = tmp_path / "s.state"
    write_atomically(path, encode_checkpoint(e.export_state(), [], NOW))
    r = subprocess.run([sys.executable, "-m", "daemon", "inspect", str(path)],
                       capture_output=True, text=True, timeout=30,
                       env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert r.returncode == 0, r.stderr
    assert "3 series" in r.stdout
    api = Moments.from_dict(next(d for d in e.export_state()
                                 if d["labels"] == ["api"])["moments"])
    assert f"{api.mean[0]:.6g}" in r.stdout
    assert "regression coefficients" in r.stdout and "mixture weights" in r.stdout


# -------------------------------------------------------- daemon-level faults
DAEMON_CONFIG = """
[daemon]
http = "{HTTP}"
state_file = "%(state)s"
checkpoint_every = "100ms"
flush_every = "20ms"

[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:%(port)d"

[[stream]]
name = "k"
topic = "k.main"
fields = ["v"]

[[stream]]
name = "f"
topic = "f.{i}"
fields = ["v"]
max_series = 5000
"""


def test_unwritable_state_directory_is_retried_while_ingest_goes_on(tmp_path):
    port = free_port()
    missing = tmp_path / "not-yet"
    d = Sigmad(tmp_path, DAEMON_CONFIG % {"state": missing / "s.state", "port": port})
    try:
        with Producer(f"tcp://127.0.0.1:{port}", source="t") as p:
            p.send("k.main", {"v": [1.0, 2.0, 3.0]})
        d.wait_for("sigmad_checkpoint_failures_total", 3)
        d.wait_for("sigmad_observations_total", 3, stream="k")
        missing.mkdir()
        d.wait_for("sigmad_checkpoint_writes_total", 1)
    finally:
        assert d.stop() == 0
    cp = read_checkpoint(missing / "s.state")
    assert [s["observations"] for s in cp.series] == [3]
    assert "checkpoint to" in d.log.read_text() and "retrying" in d.log.read_text()


KILLS = 20
BATCH = 50
STATS: dict[str, int] = {}


def test_sigkill_during_ingest_and_checkpointing_never_tears_the_file(tmp_path):
    rng = np.random.default_rng(20)
    data = rng.normal(5.0, 2.0, 1_500_000)      # the one stream, sent in order
    chooser = random.Random(20)
    state = tmp_path / "s.state"
    port = free_port()
    # checkpoints back to back (a write takes ~10 ms here): many kills land mid-write
    config = (DAEMON_CONFIG % {"state": state, "port": port}).replace('"100ms"', '"30ms"')
    endpoint = f"tcp://127.0.0.1:{port}"

    # set-up: 2000 filler series make each checkpoint about a megabyte, so that
    # a good share of the kills land while one is being written
    d = Sigmad(tmp_path, config, name="setup.toml")
    with Producer(endpoint, source="filler") as p:
        for i in range(2000):
            p.send(f"f.{i}", {"v": float(i)})
    d.wait_for("sigmad_series", 2000, stream="f", timeout=30)
    assert d.stop() == 0

    restored = 0
    mid_write = 0
    for k in range(KILLS):
        d = Sigmad(tmp_path, config, name=f"run{k}.toml")
        parsed = d.metrics()
        # the restart found and restored the last checkpoint
        assert (value(parsed, "sigmad_observations_total", stream="k") or 0.0) == restored
        assert value(parsed, "sigmad_series", stream="f") == 2000
        deadline = time.monotonic() + chooser.uniform(0.05, 0.7)
        pos = restored
        with Producer(endpoint, source="kill", linger=0, send_timeout=1.0) as p:
            while time.monotonic() < deadline and pos + BATCH <= data.size:
                p.send("k.main", {"v": data[pos:pos + BATCH]})
                pos += BATCH
                time.sleep(0.001)     # paced, so the daemon is busy ingesting when killed
            d.proc.send_signal(signal.SIGKILL)
            d.proc.wait(10)
        d.stop()
        mid_write += any(tmp_path.glob(".s.state.tmp-*"))
        cp = read_checkpoint(state)              # never torn: raises on any damage
        (main,) = [s for s in cp.series if s["stream"] == "k"] or [None]
        assert sum(1 for s in cp.series if s["stream"] == "f") == 2000
        if main is None:                         # killed before the first batch arrived
            assert restored == 0
            continue
        n = main["observations"]
        assert n % BATCH == 0 and restored <= n <= pos
        m = Moments.from_dict(main["moments"])
        prefix = data[:n]
        # reference: numpy mean and (ddof=0) variance of the prefix the checkpoint holds
        assert m.count == n
        assert math.isclose(m.mean[0], float(np.mean(prefix)), rel_tol=1e-10)
        assert math.isclose(m.variance("none")[0], float(np.var(prefix)), rel_tol=1e-9)
        restored = n
        for stale in tmp_path.glob(".s.state.tmp-*"):
            stale.unlink()                       # left by the kill; the next run writes anew
    assert not list(tmp_path.glob("s.state.corrupt-*"))
    assert restored > 0
    STATS.update(kills=KILLS, mid_write=mid_write, restored_rows=restored)
    print(f"\nSIGKILL loop: {KILLS} kills survived, {mid_write} during a checkpoint write, "
          f"{restored} rows restored at the end")
