"""Records beside a version: concurrent appends take distinct numbers and never store one key twice."""

from __future__ import annotations

import threading
from pathlib import Path
from typing import Any

from veil.registry.records import Record, append_record, read_records
from veil.registry.storage import LocalStorage

VERSION = "v0001-0123456789ab"


class _Racing(LocalStorage):
    """A directory whose first listing of the log lets another writer run its whole append meanwhile."""

    def __init__(self, root: Path, rival: dict[str, Any]) -> None:
        super().__init__(root)
        self.rival = rival
        self.raced = False

    def list(self, path: str) -> list[str]:
        found = super().list(path)
        if path.endswith("/audits") and not self.raced:
            self.raced = True
            results: list[Record] = []
            other = threading.Thread(
                target=lambda: results.append(
                    append_record(LocalStorage(self.root), "n", VERSION, "audits", **self.rival)
                )
            )
            other.start()
            other.join(timeout=1.0)  # a writer that must wait for the lock is still waiting when this returns
            self.rival["thread"], self.rival["results"] = other, results
        return found


def _append_while_another_writer_races(tmp_path: Path, mine: str, theirs: str) -> list[Record]:
    rival: dict[str, Any] = {"body": {"who": "rival"}, "key": theirs}
    storage = _Racing(tmp_path, rival)
    append_record(storage, "n", VERSION, "audits", {"who": "me"}, key=mine)
    rival.pop("thread").join(timeout=10.0)
    return read_records(LocalStorage(tmp_path), "n", VERSION, "audits")


def test_the_same_key_appended_by_two_writers_at_once_is_stored_once(tmp_path: Path) -> None:
    stored = _append_while_another_writer_races(tmp_path, "0123456789abcdef", "0123456789abcdef")
    assert [(record.number, record.key, record.body["who"]) for record in stored] == [(1, "0123456789abcdef", "me")]


def test_two_writers_at_once_take_distinct_numbers(tmp_path: Path) -> None:
    stored = _append_while_another_writer_races(tmp_path, "0123456789abcdef", "fedcba9876543210")
    assert [(record.number, record.body["who"]) for record in stored] == [(1, "me"), (2, "rival")]
