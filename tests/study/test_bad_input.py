"""Bad input is rejected whole: exit status 2, every problem by row and column, the database untouched.

Each case runs the real command line (``poolbandit.cli.main.main``, in this
process to keep the suite fast) on a copy of a small prepared study, then
checks the exit status, that the message names the row and column (and the
value) of each problem, and that the database file and its SQL dump are
byte for byte what they were. Rejecting a whole file rather than importing
the good rows is common practice for trial data capture (a partial import is
worse than none: nobody can tell which rows made it).
"""

from __future__ import annotations

import shutil

import pytest

from poolbandit.study import assign, enroll, export, init_study, record

from .helpers import DESIGN_BERNOULLI, DESIGN_GAUSSIAN, cli_in_process, db_state, write

HEADER = "participant,decision,met_goal\n"


@pytest.fixture(scope="module")
def prepared(tmp_path_factory):
    """p01..p03 enrolled; step 0 assigned and recorded (1, 0, 1); step 1 assigned, no outcomes."""
    root = tmp_path_factory.mktemp("bad-input")
    db = root / "base.sqlite"
    init_study(write(root / "design.toml", DESIGN_BERNOULLI), db, policy="ucb")
    enroll(db, write(root / "wave.csv", "participant,proficiency\np01,-0.5\np02,0.0\np03,0.5\n"))
    assign(db)
    record(db, write(root / "o0.csv", HEADER + "p01,1,1\np02,1,0\np03,1,1\n"))
    assign(db)
    log = export(db)
    arm_p01_2 = log.loc[(log["participant"] == "p01") & (log["decision"] == 2), "arm"].iat[0]
    gdb = root / "gaussian.sqlite"
    init_study(write(root / "g.toml", DESIGN_GAUSSIAN), gdb, policy="ucb")
    enroll(gdb, write(root / "gwave.csv", "participant,proficiency\np01,-0.5\np02,0.0\np03,0.5\n"))
    return {"db": db, "gdb": gdb, "other_arm": "story" if arm_p01_2 != "story" else "drill"}


def _copy(prepared, tmp_path, key="db"):
    db = tmp_path / "study.sqlite"
    shutil.copyfile(prepared[key], db)
    return db


def _rejected(capsys, db, *args, expect: list[str]):
    before = db_state(db)
    status, out, err = cli_in_process(capsys, *args)
    assert status == 2, err
    for fragment in expect:
        assert fragment in err, f"{fragment!r} not in:\n{err}"
    assert out == ""
    assert db_state(db) == before  # byte-identical file, identical dump
    return err


RECORD_CASES = {
    "unknown participant": (HEADER + "p01,2,1\nzz9,2,0\n",
                            ['row 2, column participant: unknown participant', '"zz9"']),
    "unknown decision": (HEADER + "p01,7,1\n",
                         ['row 1, column decision: decision 7 of participant "p01" has not been assigned yet']),
    "duplicate row": (HEADER + "p01,2,1\np02,2,0\np01,2,1\n",
                      ['row 3, column decision: duplicate row for participant "p01" (first on row 1)']),
    "non-numeric reward": (HEADER + "p01,2,yes\n", ['row 1, column met_goal: expected a number, got "yes"']),
    "out-of-range reward": (HEADER + "p01,2,2\n",
                            ['row 1, column met_goal: expected 0 or 1 for a bernoulli outcome, got "2"']),
    "infinite reward": (HEADER + "p01,2,inf\n", ['row 1, column met_goal: expected a finite number, got "inf"']),
    "wrong header": ("participant,decision,minutes\np01,2,1\n",
                     ['header, column 3: unknown column "minutes"', 'header: missing column "met_goal"']),
    "empty file": ("", ["the outcomes file is empty"]),
    "header only": (HEADER, ["the outcomes file has a header but no rows"]),
    "step not yet assigned": ("participant,decision,met_goal,step\np01,3,1,2\n",
                              ["row 1, column step: this step has not been assigned yet (last assigned step: 1)",
                               "row 1, column decision: decision 3"]),
    "decision not whole": (HEADER + "p01,1.5,1\n", ['row 1, column decision: expected a whole number, got "1.5"']),
    "decision zero": (HEADER + "p01,0,1\n", ['row 1, column decision: expected a number >= 1, got "0"']),
    "conflicting value": (HEADER + "p02,2,1\np01,1,0\n",
                          ["row 2, column met_goal: decision 1 of participant \"p01\" already has the outcome 1.0",
                           "--correct"]),
    "ragged row": (HEADER + "p01,2,1,extra\n", ['row 1: expected 3 fields (participant, decision, met_goal), got 4']),
    "empty participant": (HEADER + ",2,1\n", ['row 1, column participant: expected a non-empty value, got ""']),
    "step mismatch": ("participant,decision,met_goal,step\np01,2,1,0\n",
                      ['row 1, column step: decision 2 of participant "p01" was made at step 1, got "0"']),
}


@pytest.mark.parametrize("case", list(RECORD_CASES))
def test_record_rejects(case, prepared, tmp_path, capsys):
    text, expect = RECORD_CASES[case]
    db = _copy(prepared, tmp_path)
    path = write(tmp_path / "outcomes.csv", text)
    _rejected(capsys, db, "record", "--db", db, path, expect=[str(path)] + expect)


def test_record_rejects_a_wrong_arm(prepared, tmp_path, capsys):
    db = _copy(prepared, tmp_path)
    other = prepared["other_arm"]
    path = write(tmp_path / "o.csv", f"participant,decision,met_goal,arm\np02,2,1,\np01,2,1,{other}\n")
    _rejected(capsys, db, "record", "--db", db, path,
              expect=['row 1, column arm: expected one of drill, story, roleplay, got ""',
                      'row 2, column arm: decision 2 of participant "p01" was assigned',
                      f'got "{other}"'])


def test_record_rejects_non_utf8(prepared, tmp_path, capsys):
    db = _copy(prepared, tmp_path)
    path = tmp_path / "o.csv"
    path.write_bytes(HEADER.encode() + b"p\xff1,2,1\n")
    _rejected(capsys, db, "record", "--db", db, path, expect=["not UTF-8 text"])


def test_every_problem_of_a_file_is_listed_in_row_order(prepared, tmp_path, capsys):
    db = _copy(prepared, tmp_path)
    path = write(tmp_path / "o.csv", HEADER + "p01,2,maybe\nzz9,2,1\np02,2,3\np03,9,1\np02,2,3\n")
    err = _rejected(capsys, db, "record", "--db", db, path, expect=["6 problems found"])
    rows = [line.split(",")[0].strip() for line in err.splitlines() if line.strip().startswith("row ")]
    assert rows == ["row 1", "row 2", "row 3", "row 4", "row 5", "row 5"]  # row 5: bad value and a repeat


ENROL_CASES = {
    "already enrolled and repeated ids": ("participant,proficiency\np01,0.1\nq1,0.2\nq1,0.3\n",
                                          ['row 1, column participant: already enrolled, got "p01"',
                                           'row 3, column participant: duplicate participant id (first on row 2)']),
    "non-numeric covariate": ("participant,proficiency\nq1,high\nq2,\n",
                              ['row 1, column proficiency: expected a number, got "high"',
                               'row 2, column proficiency: expected a number, the cell is empty']),
    "missing covariate column": ("participant\nq1\n", ['header: missing column "proficiency"']),
}


@pytest.mark.parametrize("case", list(ENROL_CASES))
def test_enroll_rejects(case, prepared, tmp_path, capsys):
    text, expect = ENROL_CASES[case]
    db = _copy(prepared, tmp_path)
    path = write(tmp_path / "wave.csv", text)
    _rejected(capsys, db, "enroll", "--db", db, path, expect=expect)


def test_enroll_rejects_a_ratio_outside_0_1(prepared, tmp_path, capsys):
    db = _copy(prepared, tmp_path)
    path = write(tmp_path / "wave.csv", "participant,proficiency\nq1,0\n")
    _rejected(capsys, db, "enroll", "--db", db, path, "--control-ratio", "1.5", expect=["--control-ratio", "1.5"])


CONTEXT_CASES = {
    "missing participant and bad feature": (
        "participant,weekend,yesterday\np01,0,x\np02,1,0\n",
        ['row 1, column yesterday: expected a number, got "x"']),
    "missing due participant": (
        "participant,weekend,yesterday\np01,0,0.5\np02,1,0\n",
        ['column participant: participant "p03" is due decision 1 at step 0 but has no row in the context file']),
    "unknown participant": (
        "participant,weekend,yesterday\np01,0,0\np02,1,0\np03,0,0\nzz,1,1\n",
        ['row 4, column participant: unknown participant (not enrolled), got "zz"']),
    "missing feature column": ("participant,weekend\np01,0\n", ['header: missing column "yesterday"']),
}


@pytest.mark.parametrize("case", list(CONTEXT_CASES))
def test_assign_rejects_bad_context(case, prepared, tmp_path, capsys):
    text, expect = CONTEXT_CASES[case]
    db = _copy(prepared, tmp_path, "gdb")
    path = write(tmp_path / "context.csv", text)
    _rejected(capsys, db, "assign", "--db", db, "--context", path, expect=expect)


def test_assign_requires_context_when_the_design_has_features(prepared, tmp_path, capsys):
    db = _copy(prepared, tmp_path, "gdb")
    _rejected(capsys, db, "assign", "--db", db, expect=["--context", "weekend, yesterday"])
