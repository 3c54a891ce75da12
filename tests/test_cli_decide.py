"""``policyc decide`` over files as a careless or hostile input would meet it.

Pass-through columns come out byte for byte, missing values follow ``invalid_input``, the input is never
replaced, and a full disk, an unwritable place or SIGTERM leave a clear error and no partial file.
"""

from __future__ import annotations

import csv
import io
import os
import re
import resource
import signal
import subprocess
import sys
import time
from decimal import Decimal
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner, Result
from helpers import DEMOS, PACKHOUSE, two_class_text
from threadpoolctl import threadpool_info

from policyc.batch import decide_file
from policyc.cli import main
from policyc.errors import DataError
from policyc.runtime import load_rule

INCOMING = DEMOS / "packhouse" / "incoming.csv"
FEATURES = "firmness_n,blush_frac,mass_g,brix"
FRUIT = "30.24,0.274,144.4,11.94"


def run(*args: str | Path) -> Result:
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture(scope="module")
def packhouse(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The packhouse demo rule: invalid_input reject, reject action hold_for_inspector."""
    path = tmp_path_factory.mktemp("decide") / "packhouse.rule"
    assert run("compile", PACKHOUSE, "-o", path).exit_code == 0
    return path


def two_class_rule(directory: Path, **overrides: object) -> Path:
    policy, rule_file = directory / "policy.yaml", directory / "p.rule"
    policy.write_text(two_class_text(**overrides), encoding="utf-8")
    result = run("compile", policy, "-o", rule_file)
    assert result.exit_code == 0, result.output
    return rule_file


def read_rows(path: Path) -> list[dict[str, str]]:
    with path.open(newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def csv_cells(data: bytes) -> list[list[bytes]]:
    """Cell values of a CSV file read with the csv module, as Latin-1 so that every byte maps to one character."""
    rows = csv.reader(io.StringIO(data.decode("latin-1"), newline=""))
    return [[cell.encode("latin-1") for cell in row] for row in rows]


# --- pass-through columns ---------------------------------------------------------------------------------------

AWKWARD_IDS = [
    "00123",
    "007",
    "1e3",
    "12345678901234567890123",
    '"quoted, with a comma"',
    '"a ""quoted"" word"',
    '"two\nlines"',
    '"needless quotes"',
    "  padded  ",
    "",
    "X-1",
    "caf\xe9",  # Latin-1 bytes, not UTF-8
    "1.50",
    "-0",
    "TRUE",
    "2024-01-02",
]


def awkward_csv(line_end: str) -> bytes:
    lines = [f"id,{FEATURES},note"]
    lines += [f"{ident},{FRUIT},{ident}" for ident in AWKWARD_IDS]
    return (line_end.join(lines) + line_end).encode("latin-1")


@pytest.mark.parametrize("line_end", ["\n", "\r\n"])
def test_csv_pass_through_columns_are_untouched_byte_for_byte(packhouse: Path, tmp_path: Path, line_end: str) -> None:
    data, out = tmp_path / "in.csv", tmp_path / "out.csv"
    data.write_bytes(awkward_csv(line_end))
    result = run("decide", packhouse, data, "-o", out)
    assert result.exit_code == 0, result.output
    before, written = data.read_bytes(), out.read_bytes()
    # Bytes: take the added action cell off the end of every record; what remains must be the input.
    actions = "|".join(load_rule(packhouse).actions)
    stripped = re.sub(rf",(?:action|{actions})(?=\r\n|\n|$)".encode(), b"", written)
    changed = abs(len(stripped) - len(before)) + sum(a != b for a, b in zip(stripped, before, strict=False))
    # Values: every cell of every input column, read back by an independent CSV reader.
    cells_before, cells_after = csv_cells(before), csv_cells(written)
    width = len(cells_before[0])
    changed_cells = sum(old != new[:width] for old, new in zip(cells_before, cells_after, strict=True)) + abs(
        len(cells_before) - len(cells_after)
    )
    print(f"bytes changed in pass-through columns: {changed}; rows whose input cells changed: {changed_cells}")
    assert changed == 0 and changed_cells == 0
    assert len(cells_after) == len(AWKWARD_IDS) + 1 and cells_after[0][width:] == [b"action"]


def test_explain_appends_the_reason_last_and_keeps_the_input_bytes(packhouse: Path, tmp_path: Path) -> None:
    data, out = tmp_path / "in.csv", tmp_path / "out.csv"
    data.write_bytes(awkward_csv("\n"))
    assert run("decide", packhouse, data, "-o", out, "--explain").exit_code == 0
    cells_before, cells_after = csv_cells(data.read_bytes()), csv_cells(out.read_bytes())
    width = len(cells_before[0])
    assert [row[:width] for row in cells_after] == cells_before
    assert cells_after[0][width] == b"action" and cells_after[0][-1] == b"reason"
    assert {row[-1] for row in cells_after[1:]} == {b"min-risk"}


def test_an_id_column_that_turns_text_late_does_not_stop_the_run(packhouse: Path, tmp_path: Path) -> None:
    # 200,000 numeric IDs, then one that is not a number: it is not a feature, so it only passes through.
    data, out = tmp_path / "in.csv", tmp_path / "out.csv"
    body = "".join(f"{i},{FRUIT}\n" for i in range(200_000))
    data.write_text(f"item_id,{FEATURES}\n{body}X-1,{FRUIT}\n", encoding="utf-8")
    result = run("decide", packhouse, data, "-o", out)
    assert result.exit_code == 0, result.output
    lines = out.read_text(encoding="utf-8").splitlines()
    assert len(lines) == 200_002 and lines[-1].startswith(f"X-1,{FRUIT},")
    assert lines[1].startswith(f"0,{FRUIT},")


def test_csv_to_parquet_keeps_pass_through_cells_as_text(packhouse: Path, tmp_path: Path) -> None:
    data, out = tmp_path / "in.csv", tmp_path / "out.parquet"
    data.write_text(f"id,{FEATURES}\n00123,{FRUIT}\n1e3,{FRUIT}\n12345678901234567890123,{FRUIT}\n", encoding="utf-8")
    assert run("decide", packhouse, data, "-o", out).exit_code == 0
    table = pq.read_table(out)
    assert table.schema.field("id").type == pa.string()
    assert table.column("id").to_pylist() == ["00123", "1e3", "12345678901234567890123"]
    assert table.column("firmness_n").to_pylist() == ["30.24"] * 3


def test_parquet_columns_keep_their_physical_types_and_values(packhouse: Path, tmp_path: Path) -> None:
    data, out = tmp_path / "in.parquet", tmp_path / "out.parquet"
    rows = 5
    columns = {
        "serial": pa.array([10**18 + i for i in range(rows)], pa.int64()),
        "code": pa.array(["00123", "007", "1e3", None, "X-1"], pa.string()),
        "amount": pa.array([Decimal("1.10")] * rows, pa.decimal128(10, 2)),
        "small": pa.array(range(rows), pa.int8()),
        "firmness_n": pa.array([30] * rows, pa.int32()),
        "blush_frac": pa.array([0.274] * rows, pa.float32()),
        "mass_g": pa.array([144.4] * rows, pa.float64()),
        "brix": pa.array([11.94] * rows, pa.float64()),
    }
    source = pa.table(columns)
    pq.write_table(source, data)
    assert run("decide", packhouse, data, "-o", out).exit_code == 0
    written = pq.read_table(out)
    before, after = pq.ParquetFile(data).schema, pq.ParquetFile(out).schema
    for index, name in enumerate(columns):
        assert after.column(index).physical_type == before.column(index).physical_type, name
        assert written.column(name).type == source.column(name).type, name
        assert written.column(name).equals(source.column(name)), name


# --- the output never replaces the input ------------------------------------------------------------------------


@pytest.mark.parametrize("spelling", ["same", "dotted", "symlink", "hardlink"])
def test_decide_refuses_to_write_over_its_input(packhouse: Path, tmp_path: Path, spelling: str) -> None:
    data = tmp_path / "in.csv"
    data.write_bytes(INCOMING.read_bytes())
    out = {"same": data, "dotted": tmp_path / "sub" / ".." / "in.csv"}.get(spelling, tmp_path / "alias.csv")
    (tmp_path / "sub").mkdir()
    if spelling == "symlink":
        out.symlink_to(data)
    elif spelling == "hardlink":
        os.link(data, out)
    result = run("decide", packhouse, data, "-o", out)
    assert result.exit_code == 1
    assert "is the input file" in result.output and "Traceback" not in result.output
    assert data.read_bytes() == INCOMING.read_bytes()


def test_decide_keeps_an_existing_targets_mode(packhouse: Path, tmp_path: Path) -> None:
    out = tmp_path / "out.csv"
    out.write_text("old\n", encoding="utf-8")
    out.chmod(0o640)
    assert run("decide", packhouse, INCOMING, "-o", out).exit_code == 0
    assert out.stat().st_mode & 0o777 == 0o640
    assert out.read_text(encoding="utf-8").startswith("item_id,")


def test_decide_refuses_a_read_only_target(packhouse: Path, tmp_path: Path) -> None:
    out = tmp_path / "out.csv"
    out.write_text("keep me\n", encoding="utf-8")
    out.chmod(0o444)
    result = run("decide", packhouse, INCOMING, "-o", out)
    assert result.exit_code == 1
    assert "read-only" in result.output and str(out) in result.output
    assert out.read_text(encoding="utf-8") == "keep me\n" and out.stat().st_mode & 0o777 == 0o444


def test_decide_writes_through_a_symlinked_target(packhouse: Path, tmp_path: Path) -> None:
    real, link = tmp_path / "real.csv", tmp_path / "link.csv"
    real.write_text("old\n", encoding="utf-8")
    link.symlink_to(real)
    assert run("decide", packhouse, INCOMING, "-o", link).exit_code == 0
    assert link.is_symlink() and real.read_text(encoding="utf-8").startswith("item_id,")


# --- missing values follow invalid_input --------------------------------------------------------------------------

MISSING_SPELLINGS = ["", "NA", "N/A", "NaN", "nan", "null", "NULL", " "]


def test_missing_csv_cells_go_to_the_reject_action_with_reason_invalid(packhouse: Path, tmp_path: Path) -> None:
    data, out = tmp_path / "in.csv", tmp_path / "out.csv"
    lines = [f"item_id,{FEATURES}", f"ok,{FRUIT}"]
    lines += [f"m{i},30.24,0.274,{spelling},11.94" for i, spelling in enumerate(MISSING_SPELLINGS)]
    data.write_text("\n".join(lines) + "\n", encoding="utf-8")
    result = run("decide", packhouse, data, "-o", out, "--explain")
    assert result.exit_code == 0, result.output
    rows = read_rows(out)
    assert [r["reason"] for r in rows] == ["min-risk"] + ["invalid"] * len(MISSING_SPELLINGS)
    assert all(r["action"] == "hold_for_inspector" for r in rows[1:])
    assert [r["mass_g"] for r in rows[1:]] == MISSING_SPELLINGS
    assert f"invalid {len(MISSING_SPELLINGS)}" in result.output


def test_parquet_nulls_go_to_the_reject_action(packhouse: Path, tmp_path: Path) -> None:
    data, out = tmp_path / "in.parquet", tmp_path / "out.parquet"
    values = [float(v) for v in FRUIT.split(",")]
    table = pa.table(
        {name: pa.array([value, None, value]) for name, value in zip(FEATURES.split(","), values, strict=True)}
    )
    pq.write_table(table, data)
    result = run("decide", packhouse, data, "-o", out)
    assert result.exit_code == 0, result.output
    written = pq.read_table(out)
    assert written.column("action").to_pylist()[1] == "hold_for_inspector"
    assert written.column("brix").null_count == 1
    assert "invalid 1" in result.output


@pytest.mark.parametrize("spelling", ["", "NA", "NaN"])
def test_missing_cells_under_invalid_input_error_name_row_and_column(tmp_path: Path, spelling: str) -> None:
    rule_file = two_class_rule(tmp_path, invalid_input="error")
    data, out = tmp_path / "in.csv", tmp_path / "out.csv"
    data.write_text(f"ll_c0,ll_c1\n-1,-2\n-1,-2\n-3,{spelling}\n", encoding="utf-8")
    result = run("decide", rule_file, data, "-o", out)
    assert result.exit_code == 1
    assert "row 3" in result.output and "'ll_c1'" in result.output and "Traceback" not in result.output
    assert not out.exists()


def test_a_non_number_in_a_feature_column_is_an_error_naming_row_and_column(packhouse: Path, tmp_path: Path) -> None:
    data, out = tmp_path / "in.csv", tmp_path / "out.csv"
    data.write_text(f"item_id,{FEATURES}\na,{FRUIT}\nb,30.24,0.274,heavy,11.94\n", encoding="utf-8")
    result = run("decide", packhouse, data, "-o", out)
    assert result.exit_code == 1
    assert "row 2" in result.output and "'mass_g'" in result.output and "'heavy'" in result.output


# --- deferrals are counted by reason ------------------------------------------------------------------------------


@pytest.mark.parametrize("explain", [True, False])
def test_summary_counts_deferrals_by_reason(tmp_path: Path, explain: bool) -> None:
    rule_file = two_class_rule(tmp_path, reject_cost=0.3, invalid_input="reject")
    data, out = tmp_path / "in.csv", tmp_path / "out.csv"
    # equal log-likelihoods: posterior 0.5, min risk 0.5 > 0.3, deferred by risk; NA: invalid
    data.write_text("ll_c0,ll_c1\n-1,-9\n-1,-1\n-2,-2\nNA,-1\n", encoding="utf-8")
    result = run("decide", rule_file, data, "-o", out, *(["--explain"] if explain else []))
    assert result.exit_code == 0, result.output
    assert "deferred to reject: 3 (min-risk 2, novelty 0, invalid 1)" in result.output
    rows = read_rows(out)
    assert [r["action"] for r in rows] == ["a0", "reject", "reject", "reject"]
    if explain:
        assert [r["reason"] for r in rows] == ["min-risk"] * 3 + ["invalid"]


def test_blas_runs_on_one_thread_while_a_file_is_decided_and_as_before_after(packhouse: Path, tmp_path: Path) -> None:
    # The reader, the deciding thread and the writer share the cores; BLAS threads would compete with them.
    def blas_threads() -> set[int]:
        return {pool["num_threads"] for pool in threadpool_info() if pool["user_api"] == "blas"}

    before = blas_threads()
    during: list[set[int]] = []
    decide_file(load_rule(packhouse), INCOMING, tmp_path / "out.csv", progress=lambda *_: during.append(blas_threads()))
    assert during and all(threads == {1} for threads in during)
    assert blas_threads() == before


@pytest.mark.parametrize("name", ["out.csv", "out.parquet"])
def test_deciding_without_explanations_gives_the_explained_actions_and_counts(
    packhouse: Path, tmp_path: Path, name: str
) -> None:
    """The decide-only path (no posteriors) against the full computation, over many small batches in flight."""
    rule = load_rule(packhouse)
    plain, explained = tmp_path / name, tmp_path / f"explained-{name}"
    plain_counts = decide_file(rule, INCOMING, plain, batch_rows=7)
    explained_counts = decide_file(rule, INCOMING, explained, explain=True, batch_rows=7)
    assert plain_counts == explained_counts and plain_counts.rows == len(read_rows(INCOMING))
    actions = [
        pq.read_table(path).column("action").to_pylist()
        if name.endswith(".parquet")
        else [r["action"] for r in read_rows(path)]
        for path in (plain, explained)
    ]
    assert actions[0] == actions[1]


# --- unreadable input, unwritable output, interruption --------------------------------------------------------------


def test_a_latin1_feature_cell_is_a_clear_error(packhouse: Path, tmp_path: Path) -> None:
    data, out = tmp_path / "in.csv", tmp_path / "out.csv"
    data.write_bytes(f"item_id,{FEATURES}\na,{FRUIT}\nb,30.24,0.274,caf\xe9,11.94\n".encode("latin-1"))
    result = run("decide", packhouse, data, "-o", out)
    assert result.exit_code == 1
    assert str(data) in result.output and "'mass_g'" in result.output and "row 2" in result.output
    assert "Traceback" not in result.output and not out.exists()


def test_latin1_pass_through_text_cannot_become_parquet_text(packhouse: Path, tmp_path: Path) -> None:
    data, out = tmp_path / "in.csv", tmp_path / "out.parquet"
    data.write_bytes(f"item_id,{FEATURES}\na,{FRUIT}\ncaf\xe9,{FRUIT}\n".encode("latin-1"))
    result = run("decide", packhouse, data, "-o", out)
    assert result.exit_code == 1
    assert "'item_id'" in result.output and "UTF-8" in result.output and "row 2" in result.output
    assert not out.exists()


def test_an_unwritable_directory_is_a_clear_error(
    packhouse: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    if os.geteuid() == 0:  # root writes anywhere: refuse files in the directory as the system would a user
        real_open = os.open

        def guarded_open(path: str | Path, flags: int, *args: int, **kwargs: int) -> int:
            if Path(path).parent == locked:
                raise PermissionError(13, "Permission denied", str(path))
            return real_open(path, flags, *args, **kwargs)

        monkeypatch.setattr(os, "open", guarded_open)
    result = run("decide", packhouse, INCOMING, "-o", locked / "out.csv")
    assert result.exit_code == 1
    assert "Permission denied" in result.output and str(locked) in result.output
    assert "Traceback" not in result.output and list(locked.iterdir()) == []


def cli_subprocess(*args: str | Path, limit_bytes: int | None = None) -> subprocess.Popen[bytes]:
    def limit() -> None:  # runs in the child: a file-size limit stands in for a full disk
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # then a write past the limit fails with EFBIG
        assert limit_bytes is not None
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit_bytes, limit_bytes))

    command = [sys.executable, "-m", "policyc", *map(str, args)]
    return subprocess.Popen(
        command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, preexec_fn=limit if limit_bytes else None
    )


def test_a_full_disk_is_a_clear_error_and_leaves_nothing(packhouse: Path, tmp_path: Path) -> None:
    out = tmp_path / "out.csv"
    process = cli_subprocess("decide", packhouse, INCOMING, "-o", out, limit_bytes=4096)
    _, stderr = process.communicate(timeout=120)
    message = stderr.decode()
    assert process.returncode == 1, message
    assert str(out) in message and "File too large" in message and "Traceback" not in message
    assert list(tmp_path.iterdir()) == []


def test_no_space_left_is_a_clear_error(packhouse: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import pyarrow.parquet

    class FullDisk:
        def __init__(self, *args: object, **kwargs: object) -> None:
            raise OSError(28, "No space left on device")

    monkeypatch.setattr(pyarrow.parquet, "ParquetWriter", FullDisk)
    out = tmp_path / "out.parquet"
    result = run("decide", packhouse, INCOMING, "-o", out)
    assert result.exit_code == 1
    assert "No space left on device" in result.output and str(out) in result.output
    assert "Traceback" not in result.output and list(tmp_path.iterdir()) == []


def process_state(pid: int) -> str:
    """The state letter of a Linux process (R running, S sleeping, T stopped, Z exited)."""
    return Path(f"/proc/{pid}/stat").read_text(encoding="ascii").rsplit(") ", 1)[1][0]


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads process states from Linux's /proc")
def test_sigterm_removes_the_partial_file(packhouse: Path, tmp_path: Path) -> None:
    data, out = tmp_path / "big.csv", tmp_path / "out.csv"
    rows = np.tile(np.array([[30.24, 0.274, 144.4, 11.94]]), (400_000, 1))
    np.savetxt(data, rows, delimiter=",", fmt="%.4g", header=FEATURES, comments="")
    for _attempt in range(3):
        process = cli_subprocess("decide", packhouse, data, "-o", out)
        deadline = time.monotonic() + 60
        while not any(p.suffix == ".partial" for p in tmp_path.iterdir()) and process.poll() is None:
            assert time.monotonic() < deadline
            time.sleep(0.002)
        process.send_signal(signal.SIGSTOP)  # hold it while checking that it is still mid-write
        while process_state(process.pid) not in "TtZ":
            time.sleep(0.001)
        mid_write = process_state(process.pid) != "Z" and any(p.suffix == ".partial" for p in tmp_path.iterdir())
        process.send_signal(signal.SIGTERM)
        process.send_signal(signal.SIGCONT)
        _, stderr = process.communicate(timeout=60)
        if mid_write:
            break
        out.unlink(missing_ok=True)
    else:
        pytest.fail("decide finished before it could be interrupted three times")
    assert process.returncode == 128 + signal.SIGTERM, stderr.decode()
    assert "Traceback" not in stderr.decode()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["big.csv"]


def test_the_summary_still_counts_every_action(packhouse: Path, tmp_path: Path) -> None:
    out = tmp_path / "out.csv"
    result = run("decide", packhouse, INCOMING, "-o", out)
    rule = load_rule(packhouse)
    assert result.exit_code == 0
    assert all(name in result.output for name in rule.actions)


def test_an_invalid_row_in_a_later_batch_is_named_by_its_row_in_the_file(tmp_path: Path) -> None:
    rule = load_rule(two_class_rule(tmp_path, invalid_input="error"))
    data, out = tmp_path / "in.csv", tmp_path / "out.csv"
    data.write_text("ll_c0,ll_c1\n-1,-2\n-1,-2\n-1,-2\n-1,NA\n", encoding="utf-8")
    with pytest.raises(DataError, match=r"row\(s\) 4 \(1-based\).*row 4: 'll_c1'"):
        decide_file(rule, data, out, batch_rows=2)
    assert not out.exists()


def test_a_binary_file_is_refused_with_a_printable_message(packhouse: Path, tmp_path: Path) -> None:
    data = tmp_path / "junk.csv"
    data.write_bytes(bytes(range(256)) * 40)
    result = run("decide", packhouse, data, "-o", tmp_path / "out.csv")
    assert result.exit_code == 1 and str(data) in result.output and "Traceback" not in result.output
    message = result.output.strip()
    assert message.isprintable() and len(message) < 400, message
