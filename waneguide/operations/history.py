"""The scoring history: every estimate ever issued, in a real database (SQLAlchemy).

One row per (capture content hash, model id): a capture scored twice by the same model is
stored once, so counts, trends and audits never double count. The model id is the bundle's
content identity (:attr:`waneguide.models.bundle.ModelBundle.model_id`, a hash of every file
of the bundle), not its version label: two different models that are both "v001" (trained
into two stores) never share rows. Both are stored and shown. Rows written through this API
without a ``model_id`` use the version label in its place. The
history is append-only (rows are inserted, never updated or deleted) and every
batch of rows goes in one transaction, so an interrupted scoring run leaves each
finished batch intact and a rerun only does the rest.

The default is an embedded SQLite file (``sqlite:///waneguide-history.db`` in the
working directory: nothing to start). SQLite files are opened in WAL mode with a
busy timeout and write transactions start with ``BEGIN IMMEDIATE``, so several
scoring processes can write to one file at the same time without losing rows.
A fleet points ``db_url`` at a server database instead (any SQLAlchemy URL, e.g.
``postgresql+psycopg://user@127.0.0.1/waneguide``; the driver must be installed).

Tables
------
``scores``
    One row per scored capture: identity (``content_hash``, ``model_id``, ``model_version``,
    ``family_name``, ``family_fingerprint``), capture metadata (``file``,
    ``path_id``, ``captured_at``, ``temperature_c``), the estimates and bands in
    percent of nominal thickness and in mm, ``exceed_probability`` (with the
    ``limit_pct`` used), the mismatch verdict, the quality flags, ``status``
    (``scored`` or ``rejected``) and the numeric features as JSON (used for
    feature-drift checks in the audit).
``audits``
    One row per audit: when, which model, the verdict and a JSON summary.
``service_changes``
    One row per version moved into service (``promote``, ``rollback``): when, which store,
    from and to which version, the OS user and the required note.
"""
from __future__ import annotations

import contextlib
import hashlib
import json
import math
import os
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Mapping

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.dialects.postgresql import insert as postgresql_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert

from waneguide.core.errors import InputError, StorageError
from waneguide.core.settings import DEFAULT_HISTORY_FILE

__all__ = [
    "DEFAULT_DB_URL",
    "History",
    "SCORE_COLUMNS",
    "capture_content_hash",
    "resolve_db_url",
]

#: Default history location (an SQLite file in the working directory).
DEFAULT_DB_URL = f"sqlite:///{DEFAULT_HISTORY_FILE}"

#: Environment variable that overrides the default URL (the ``--db`` option wins over it).
DB_URL_ENV = "WANEGUIDE_DB"

# name -> (kind, nullable); kinds: str, float, bool, text, int
_SCORE_SCHEMA: dict[str, str] = {
    "content_hash": "str",
    "model_version": "str",
    "model_id": "str",
    "family_name": "str",
    "family_fingerprint": "str",
    "file": "text",
    "path_id": "str",
    "captured_at": "str",
    "temperature_c": "float",
    "status": "str",
    "max_loss_pct": "float",
    "max_loss_pct_lower": "float",
    "max_loss_pct_upper": "float",
    "max_loss_mm": "float",
    "max_loss_mm_lower": "float",
    "max_loss_mm_upper": "float",
    "mean_loss_pct": "float",
    "mean_loss_pct_lower": "float",
    "mean_loss_pct_upper": "float",
    "exceed_probability": "float",
    "limit_pct": "float",
    "in_family": "bool",
    "mismatch_p_value": "float",
    "mismatch_reasons": "text",
    "quality_flags": "text",
    "features_json": "text",
    "batch_id": "str",
    "scored_at": "str",
}

#: Columns of the ``scores`` table, in order (the autoincrement ``id`` comes first in the table).
SCORE_COLUMNS = tuple(_SCORE_SCHEMA)
#: A row's identity: one estimate per capture content and model content.
_KEY = ("content_hash", "model_id")
_REQUIRED = ("content_hash", "model_version", "model_id")


def resolve_db_url(db_url: str | None) -> str:
    """``db_url``, else ``$WANEGUIDE_DB``, else :data:`DEFAULT_DB_URL`.

    A bare file path (no ``://``) is taken as an SQLite file.
    """
    url = db_url or os.environ.get(DB_URL_ENV) or DEFAULT_DB_URL
    url = str(url)
    if "://" not in url:
        url = f"sqlite:///{os.path.abspath(url)}"
    return url


def sqlite_file(url: str):
    """The file of an ``sqlite:///PATH`` URL as a Path (None for other databases or in-memory)."""

    if not url.startswith("sqlite"):
        return None
    rest = url.split("://", 1)[1] if "://" in url else ""
    path = rest[1:] if rest.startswith("/") else rest
    path = path.split("?", 1)[0]
    if not path or path == ":memory:":
        return None
    return Path(path)


def capture_content_hash(capture) -> str:
    """SHA-256 of what a capture *is*: its samples and its acquisition metadata.

    The file name is left out, so a renamed or copied file is recognised as the same
    capture. The amplitude is hashed as little-endian float64.
    """
    h = hashlib.sha256()
    amp = np.ascontiguousarray(np.asarray(capture.amplitude_v, dtype="<f8"))
    h.update(amp.tobytes())
    meta = {
        "sample_rate_hz": float(capture.sample_rate_hz),
        "pretrigger_s": float(capture.pretrigger_s or 0.0),
        "path_id": str(capture.path_id or ""),
        "captured_at": None if capture.captured_at is None else str(capture.captured_at),
        "temperature_c": None if capture.temperature_c is None else float(capture.temperature_c),
    }
    h.update(json.dumps(meta, sort_keys=True).encode())
    return h.hexdigest()


def _now_iso() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _clean(kind: str, value: Any) -> Any:
    """Python value for one cell (NaN -> None, numpy scalars -> Python)."""
    if value is None:
        return None
    if isinstance(value, float) and math.isnan(value):
        return None
    if kind == "float":
        try:
            v = float(value)
        except (TypeError, ValueError):
            return None
        return None if math.isnan(v) else v
    if kind == "bool":
        try:
            if isinstance(value, float) and math.isnan(value):
                return None
        except TypeError:
            pass
        return bool(value)
    if kind in ("str", "text"):
        if isinstance(value, (list, tuple)):
            return "; ".join(str(v) for v in value)
        if not isinstance(value, str):
            try:
                if value != value:  # pandas NA / NaT
                    return None
            except (TypeError, ValueError):
                pass
        return str(value)
    return value


class History:
    """The scoring and audit history behind one SQLAlchemy URL.

    Parameters
    ----------
    db_url : str or None
        Any SQLAlchemy URL; None -> ``$WANEGUIDE_DB`` or :data:`DEFAULT_DB_URL`.
    busy_timeout_s : float, default 60
        How long an SQLite writer waits for another writer's lock [s].

    Examples
    --------
    >>> h = History("sqlite://")          # in-memory, for a quick look
    >>> h.add_scores([{"content_hash": "ab", "model_version": "v1", "path_id": "P1"}])
    1
    >>> h.add_scores([{"content_hash": "ab", "model_version": "v1", "path_id": "P1"}])
    0
    >>> len(h.scores())
    1
    """

    def __init__(self, db_url: str | None = None, *, busy_timeout_s: float = 60.0):
        self.url = resolve_db_url(db_url)
        self.busy_timeout_s = float(busy_timeout_s)
        self._engine = None
        self._tables = None
        self._returning = False

    # -- engine and schema -----------------------------------------------------------
    @property
    def is_sqlite(self) -> bool:
        return self.url.startswith("sqlite")

    @property
    def engine(self):
        if self._engine is None:
            engine = self._make_engine()
            self._tables = self._define_tables()
            self._create_schema(engine)
            self._engine = engine
        return self._engine

    def _create_schema(self, engine) -> None:
        """Create the tables once, safely when several processes open a new database at once.

        ``create_all`` checks and creates in two steps, so concurrent first use races (SQLite:
        "database is locked"; PostgreSQL: a duplicate table). Each attempt runs in its own
        transaction and is retried; a table that a concurrent process created meanwhile is fine.
        Then the stored schema is checked against this version's.
        """
        md = self._tables["metadata"]
        for attempt in range(40):
            try:
                with engine.connect() as conn:
                    conn = conn.execution_options(waneguide_write=True)
                    with conn.begin():
                        md.create_all(conn, checkfirst=True)
                break
            except Exception as exc:  # noqa: BLE001 - retried only for the races named above
                text = str(exc).lower()
                racing = self._is_busy(exc) or "already exists" in text or "duplicate" in text
                if not racing or attempt == 39:
                    raise
                time.sleep(0.05 * (1 + attempt % 8))
        have = {c["name"] for c in sa.inspect(engine).get_columns("scores")}
        missing = [c for c in SCORE_COLUMNS if c not in have]
        if missing:
            raise InputError(
                f"history database {self._safe_url()} was written by an earlier waneguide (its scores table has "
                f"no {', '.join(missing)}); nothing was changed. Give a new --db for this version, and keep the "
                "old file for its records.")

    def _make_engine(self):
        if not self.is_sqlite:
            try:
                return sa.create_engine(self.url, pool_pre_ping=True)
            except Exception as exc:  # noqa: BLE001 - a bad URL or a missing driver
                raise InputError(
                    f"cannot open history database {self._safe_url()!r}: {exc}. "
                    "Give an SQLAlchemy URL such as sqlite:///waneguide-history.db or "
                    "postgresql+psycopg://user@127.0.0.1/waneguide (with its driver installed)."
                ) from None
        url = sa.engine.make_url(self.url)
        memory = url.database in (None, "", ":memory:")
        if not memory:
            parent = os.path.dirname(os.path.abspath(url.database))
            if not os.path.isdir(parent):
                raise InputError(
                    f"history database folder {parent!r} does not exist (from --db {self.url!r}). "
                    "Create the folder or give another path."
                )
        kwargs: dict[str, Any] = {"connect_args": {"timeout": self.busy_timeout_s}}
        if memory:
            kwargs["poolclass"] = sa.pool.StaticPool
            kwargs["connect_args"]["check_same_thread"] = False
        engine = sa.create_engine(self.url, **kwargs)
        busy_ms = int(self.busy_timeout_s * 1000)

        @event.listens_for(engine, "connect")
        def _on_connect(dbapi_conn, _record):  # pragma: no cover - exercised via every test
            # Let SQLAlchemy's "begin" event choose the BEGIN flavour (pysqlite recipe).
            dbapi_conn.isolation_level = None
            cur = dbapi_conn.cursor()
            if not memory:
                cur.execute("PRAGMA journal_mode=WAL")
                cur.execute("PRAGMA synchronous=NORMAL")
            cur.execute(f"PRAGMA busy_timeout={busy_ms}")
            cur.close()

        @event.listens_for(engine, "begin")
        def _on_begin(conn):  # pragma: no cover - exercised via every test
            # Writers take the write lock up front (BEGIN IMMEDIATE): a deferred transaction that
            # upgrades from read to write can fail with SQLITE_BUSY without waiting.
            if conn.get_execution_options().get("waneguide_write"):
                conn.exec_driver_sql("BEGIN IMMEDIATE")
            else:
                conn.exec_driver_sql("BEGIN")

        return engine

    def _safe_url(self) -> str:
        try:
            return sa.engine.make_url(self.url).render_as_string(hide_password=True)
        except Exception:  # noqa: BLE001
            return "<unparseable URL>"

    def _define_tables(self) -> dict:
        md = sa.MetaData()
        types = {"str": sa.String(255), "text": sa.Text(), "float": sa.Float(), "bool": sa.Boolean(), "int": sa.Integer()}
        cols = [sa.Column("id", sa.Integer, primary_key=True, autoincrement=True)]
        for name, kind in _SCORE_SCHEMA.items():
            cols.append(sa.Column(name, types[kind], nullable=name not in _REQUIRED))
        scores = sa.Table(
            "scores", md, *cols,
            sa.UniqueConstraint("content_hash", "model_id", name="uq_scores_capture_model_id"),
            sa.Index("ix_scores_path_time", "path_id", "captured_at"),
        )
        audits = sa.Table(
            "audits", md,
            sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
            sa.Column("run_at", sa.String(40), nullable=False),
            sa.Column("model_version", sa.String(255), nullable=False),
            sa.Column("model_id", sa.String(255)),
            sa.Column("readings_file", sa.Text()),
            sa.Column("verdict", sa.String(40), nullable=False),
            sa.Column("summary_json", sa.Text()),
        )
        service = sa.Table(
            "service_changes", md,
            sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
            sa.Column("changed_at", sa.String(40), nullable=False),
            sa.Column("action", sa.String(20), nullable=False),
            sa.Column("store", sa.Text(), nullable=False),
            sa.Column("from_version", sa.String(255)),
            sa.Column("to_version", sa.String(255), nullable=False),
            sa.Column("model_id", sa.String(255)),
            sa.Column("os_user", sa.String(255)),
            sa.Column("note", sa.Text(), nullable=False),
        )
        return {"metadata": md, "scores": scores, "audits": audits, "service_changes": service}

    @contextlib.contextmanager
    def _storage_errors(self):
        """Turn "disk full" / "read-only" failures of the database into one clear :class:`StorageError`."""
        try:
            yield
        except sa.exc.OperationalError as exc:
            text = str(getattr(exc, "orig", exc)).lower()
            if "full" in text or "readonly" in text or "read-only" in text or "no space" in text:
                raise StorageError(f"history database {self._safe_url()} could not store the rows: "
                                   f"{str(getattr(exc, 'orig', exc)).strip()}. Nothing already stored was lost; "
                                   "free space (or fix the permissions) and run the command again: finished "
                                   "rows are kept and only the rest is done.") from None
            raise

    def _write(self):
        """A connection context for one write transaction (BEGIN IMMEDIATE on SQLite)."""
        conn = self.engine.connect()
        if self.is_sqlite:
            conn = conn.execution_options(waneguide_write=True)
        return conn

    def close(self) -> None:
        if self._engine is not None:
            self._engine.dispose()
            self._engine = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def __repr__(self) -> str:
        return f"History({self._safe_url()!r})"

    # -- scores ----------------------------------------------------------------------
    def _rows(self, rows: Iterable[Mapping[str, Any]] | Any) -> list[dict]:
        if hasattr(rows, "to_dict") and hasattr(rows, "columns"):
            rows = rows.to_dict(orient="records")
        out = []
        stamp = _now_iso()
        for i, row in enumerate(rows):
            rec = {name: _clean(kind, row.get(name)) for name, kind in _SCORE_SCHEMA.items()}
            for key in ("content_hash", "model_version"):
                if not rec[key]:
                    raise InputError(f"history row {i}: {key} is required; got {row.get(key)!r}.")
            rec["model_id"] = rec["model_id"] or rec["model_version"]
            rec["scored_at"] = rec["scored_at"] or stamp
            rec["status"] = rec["status"] or "scored"
            out.append(rec)
        return out

    def add_scores(self, rows) -> int:
        """Insert score rows in one transaction; rows already present are left as they are.

        Parameters
        ----------
        rows : iterable of mappings or DataFrame
            Keys among :data:`SCORE_COLUMNS`; ``content_hash`` and ``model_version`` required.

        Returns
        -------
        int
            Number of rows actually added (duplicates of stored rows count 0).
        """
        recs = self._rows(rows)
        if not recs:
            return 0
        # Duplicates inside one batch: keep the first.
        seen, unique = set(), []
        for r in recs:
            key = (r["content_hash"], r["model_id"])
            if key not in seen:
                seen.add(key)
                unique.append(r)
        table = self._tables_ready()["scores"]
        stmt = self._insert_ignore(table)
        for attempt in range(20):
            try:
                with self._storage_errors(), self._write() as conn, conn.begin():
                    res = conn.execute(stmt, unique)
                    if self._returning:
                        # the rows the database inserted (RETURNING): a driver's rowcount for a
                        # multi-row INSERT ... ON CONFLICT DO NOTHING counts the skipped ones too
                        return len(res.all())
                    return int(res.rowcount if res.rowcount is not None and res.rowcount >= 0 else len(unique))
            except Exception as exc:  # noqa: BLE001 - retried only when the database is busy
                if not self._is_busy(exc) or attempt == 19:
                    raise
                time.sleep(0.05 * (attempt + 1))
        return 0  # pragma: no cover

    def _tables_ready(self) -> dict:
        _ = self.engine
        return self._tables

    def _insert_ignore(self, table):
        name = self.engine.dialect.name
        self._returning = name in ("sqlite", "postgresql")
        if name == "sqlite":
            return sqlite_insert(table).on_conflict_do_nothing(index_elements=list(_KEY)).returning(table.c.id)
        if name == "postgresql":
            return postgresql_insert(table).on_conflict_do_nothing(index_elements=list(_KEY)).returning(table.c.id)
        if name in ("mysql", "mariadb"):
            return table.insert().prefix_with("IGNORE")
        raise InputError(f"history database dialect {name!r} is not supported; use SQLite or PostgreSQL.")

    @staticmethod
    def _is_busy(exc: Exception) -> bool:
        text = str(exc).lower()
        return "database is locked" in text or "database is busy" in text

    def _where(self, q, t, model_version, model_id):
        if model_version is not None:
            q = q.where(t.c.model_version == str(model_version))
        if model_id is not None:
            q = q.where(t.c.model_id == str(model_id))
        return q

    def scored_hashes(self, model_version: str | None = None, *, model_id: str | None = None) -> set[str]:
        """Content hashes already scored by the model ``model_id`` (or, without it, ``model_version``)."""
        t = self._tables_ready()["scores"]
        if model_id is None and model_version is None:
            raise InputError("scored_hashes needs model_id (or model_version)")
        q = self._where(sa.select(t.c.content_hash), t, None if model_id is not None else model_version, model_id)
        with self.engine.connect() as conn:
            return {r[0] for r in conn.execute(q)}

    def count(self, *, model_version: str | None = None, model_id: str | None = None) -> int:
        t = self._tables_ready()["scores"]
        q = self._where(sa.select(sa.func.count()).select_from(t), t, model_version, model_id)
        with self.engine.connect() as conn:
            return int(conn.execute(q).scalar_one())

    def scores(self, *, model_version: str | None = None, model_id: str | None = None, path_id: str | None = None,
               content_hashes: Iterable[str] | None = None, with_features: bool = False):
        """Stored score rows as a DataFrame, ordered by path and capture time.

        ``captured_at`` stays the ISO text that was stored; ``in_family`` is boolean.
        """

        t = self._tables_ready()["scores"]
        cols = [t.c.id] + [t.c[n] for n in SCORE_COLUMNS if with_features or n != "features_json"]
        q = self._where(sa.select(*cols), t, model_version, model_id)
        if path_id is not None:
            q = q.where(t.c.path_id == str(path_id))
        frames = []
        with self.engine.connect() as conn:
            if content_hashes is not None:
                hashes = list(dict.fromkeys(content_hashes))
                for i in range(0, len(hashes), 500):
                    part = q.where(t.c.content_hash.in_(hashes[i:i + 500]))
                    frames.append(pd.DataFrame(conn.execute(part).mappings().all(), columns=[c.name for c in cols]))
            else:
                frames.append(pd.DataFrame(conn.execute(q).mappings().all(), columns=[c.name for c in cols]))
        df = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=[c.name for c in cols])
        df = df.sort_values(["path_id", "captured_at", "id"], kind="stable", na_position="last").reset_index(drop=True)
        if "in_family" in df:
            df["in_family"] = df["in_family"].astype("boolean")
        for name, kind in _SCORE_SCHEMA.items():
            if kind == "float" and name in df:
                df[name] = pd.to_numeric(df[name], errors="coerce").astype(float)
        return df

    def features(self, *, model_version: str | None = None, model_id: str | None = None,
                 content_hashes: Iterable[str] | None = None):
        """Stored numeric features, one row per score row (index ``content_hash``)."""
        df = self.scores(model_version=model_version, model_id=model_id, content_hashes=content_hashes,
                         with_features=True)
        recs = []
        for h, blob in zip(df["content_hash"], df["features_json"]):
            rec = json.loads(blob) if isinstance(blob, str) and blob else {}
            rec["content_hash"] = h
            recs.append(rec)
        out = pd.DataFrame(recs)
        if out.empty:
            return pd.DataFrame(columns=["content_hash"]).set_index("content_hash")
        out = out.drop_duplicates("content_hash").set_index("content_hash")
        return out.apply(pd.to_numeric, errors="coerce")

    # -- audits ----------------------------------------------------------------------
    def add_audit(self, *, model_version: str, verdict: str, summary: Mapping[str, Any],
                  readings_file: str | None = None, model_id: str | None = None) -> int:
        """Append one audit record; returns its id."""
        t = self._tables_ready()["audits"]
        rec = {
            "run_at": _now_iso(),
            "model_version": str(model_version),
            "model_id": None if model_id is None else str(model_id),
            "readings_file": readings_file,
            "verdict": str(verdict),
            "summary_json": json.dumps(summary, default=_json_default, sort_keys=True),
        }
        with self._storage_errors(), self._write() as conn, conn.begin():
            res = conn.execute(t.insert().values(**rec))
            return int(res.inserted_primary_key[0])

    def add_service_change(self, *, action: str, store: str, from_version: str | None, to_version: str,
                           model_id: str | None, os_user: str, note: str) -> int:
        """Append one record of a version moved into service (promote, rollback); returns its id."""
        t = self._tables_ready()["service_changes"]
        rec = {"changed_at": _now_iso(), "action": action, "store": store, "from_version": from_version,
               "to_version": to_version, "model_id": model_id, "os_user": os_user, "note": note}
        with self._storage_errors(), self._write() as conn, conn.begin():
            return int(conn.execute(t.insert().values(**rec)).inserted_primary_key[0])

    def service_changes(self):
        """Every promote / rollback, oldest first."""
        t = self._tables_ready()["service_changes"]
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(t).order_by(t.c.id)).mappings().all()
        return pd.DataFrame(rows, columns=[c.name for c in t.columns])

    def audits(self):
        t = self._tables_ready()["audits"]
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(t).order_by(t.c.id)).mappings().all()
        return pd.DataFrame(rows, columns=[c.name for c in t.columns])


def _json_default(obj):
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        v = float(obj)
        return None if math.isnan(v) else v
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    return str(obj)
