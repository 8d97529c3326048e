"""A live study in one SQLite file: init, enroll, assign, record, status, export, verify.

See :mod:`poolbandit.study.operations` for the operations and
:mod:`poolbandit.study.store` for the schema; :mod:`poolbandit.study.replay`
explains how every assignment is re-derived from the store.
"""

from .operations import (
    ASSIGNMENT_COLUMNS,
    EnrolResult,
    RecordResult,
    StudyInfo,
    StudyStatus,
    VerifyReport,
    assign,
    enroll,
    export,
    init_study,
    record,
    status,
    verify,
)
from .store import SCHEMA_VERSION, StoreError

__all__ = [
    "ASSIGNMENT_COLUMNS", "EnrolResult", "RecordResult", "SCHEMA_VERSION", "StoreError", "StudyInfo",
    "StudyStatus", "VerifyReport", "assign", "enroll", "export", "init_study", "record", "status", "verify",
]
