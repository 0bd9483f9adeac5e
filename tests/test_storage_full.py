"""A full store gives one clear error and keeps what was stored (issue 11: disk full ended in tracebacks)."""
from __future__ import annotations

import pytest
import sqlalchemy as sa

from waneguide.core.errors import StorageError, WaneguideError
from waneguide.operations.history import History


def test_a_full_history_database_raises_storage_error_and_keeps_its_rows(tmp_path):
    h = History(f"sqlite:///{tmp_path / 'h.db'}")
    first = [{"content_hash": f"a{i}", "model_version": "v001", "model_id": "m", "path_id": "P01"} for i in range(5)]
    assert h.add_scores(first) == 5
    # SQLite's page limit makes the database "full" (SQLite docs, PRAGMA max_page_count: inserts then fail
    # with SQLITE_FULL, "database or disk is full"), the same error a full disk gives
    pages = h.engine.connect().exec_driver_sql("PRAGMA page_count").scalar()
    sa.event.listen(h.engine, "connect", lambda conn, _rec: conn.execute(f"PRAGMA max_page_count={pages + 1}"))
    h.engine.dispose()
    big = [{"content_hash": f"b{i}", "model_version": "v001", "model_id": "m", "path_id": "P01",
            "mismatch_reasons": "x" * 4000} for i in range(200)]
    with pytest.raises(StorageError, match="could not store the rows.*full.*Nothing already stored was lost") as info:
        h.add_scores(big)
    assert isinstance(info.value, WaneguideError)  # the CLI prints it as one line
    h.close()
    assert History(f"sqlite:///{tmp_path / 'h.db'}").count() == 5  # the batch was one transaction: all or none
