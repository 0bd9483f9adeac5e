"""Which model version is in service, and moving it: ``promote`` and ``rollback``.

The rule (one for every command): a model store folder means the version named in its
``IN_SERVICE`` file (:func:`waneguide.models.bundle.in_service_version`); ``train`` sets it when
it adds a version, ``audit --recalibrate`` writes a challenger without moving it, and only
:func:`promote` and :func:`rollback` move it afterwards. Each move needs a note and is recorded
three times: appended to the store's ``service-log.jsonl``, as a row of the history database's
``service_changes`` table, and, when the version is registered in MLflow, by moving the
registered model's ``in-service`` alias and tagging the version with the note.
"""
from __future__ import annotations

import getpass
import json
import os
from datetime import datetime, timezone
from pathlib import Path

from mlflow.exceptions import MlflowException
from mlflow.tracking import MlflowClient

from waneguide.core.errors import InputError
from waneguide.models.bundle import VERSION_RE, in_service_version, load_bundle, set_in_service
from waneguide.operations.history import History
from waneguide.operations.registry import DEFAULT_ALIAS, registered_name
from waneguide.operations.tracking import init_tracking

__all__ = ["SERVICE_LOG", "in_service", "promote", "rollback", "service_log"]

#: Append-only record of every move, one JSON object per line, in the model store.
SERVICE_LOG = "service-log.jsonl"


def _store(model_store) -> Path:
    store = Path(model_store)
    if not store.is_dir() or not any(VERSION_RE.match(p.name) for p in store.iterdir()):
        raise InputError(f"{str(store)!r} is not a model store (a folder of vNNN versions written by "
                         "`waneguide train --out`); give the store, not one version folder")
    return store


def in_service(model_store) -> str:
    """The version in service in ``model_store`` (its ``IN_SERVICE`` file, else the newest)."""
    store = _store(model_store)
    return in_service_version(store) or load_bundle(store).version


def service_log(model_store) -> list[dict]:
    """The store's record of moves, oldest first."""
    f = _store(model_store) / SERVICE_LOG
    if not f.is_file():
        return []
    return [json.loads(line) for line in f.read_text().splitlines() if line.strip()]


def _os_user() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no login name (containers): the numeric id still says who
        return f"uid {os.getuid()}"


def _move(store: Path, version: str, *, action: str, note: str, db_url, tracking_uri, track: bool) -> dict:
    if not isinstance(note, str) or not note.strip():
        raise InputError(f"{action} needs a note saying why (--note TEXT); it is kept with the record")
    bundle = load_bundle(store / version) if (store / version).is_dir() else None
    if bundle is None:
        have = sorted(p.name for p in store.iterdir() if VERSION_RE.match(p.name))
        raise InputError(f"model store {str(store)!r} has no version {version!r}; versions there: {have}")
    before = in_service(store)
    rec = {"changed_at": datetime.now(timezone.utc).isoformat(timespec="seconds"), "action": action,
           "store": str(store.resolve()), "from_version": before, "to_version": version,
           "model_id": bundle.model_id, "os_user": _os_user(), "note": note.strip()}
    registered = None
    if track:  # check the tracking store before anything moves
        registered = _registered_version(bundle, tracking_uri)
    set_in_service(store, version)
    with open(store / SERVICE_LOG, "a", encoding="utf-8") as fh:  # append: the log is never rewritten
        fh.write(json.dumps(rec, sort_keys=True) + "\n")
        fh.flush()
        os.fsync(fh.fileno())
    with History(db_url) as hist:
        hist.add_service_change(**{k: rec[k] for k in ("action", "store", "from_version", "to_version",
                                                        "model_id", "os_user", "note")})
    if registered is not None:
        client, name, mv = registered
        client.set_registered_model_alias(name, DEFAULT_ALIAS, mv)
        client.set_model_version_tag(name, mv, f"waneguide_{action}_note", rec["note"][:4000])
        rec["registered_version"] = mv
    return rec


def _registered_version(bundle, tracking_uri):
    """(client, registered name, MLflow version) of the bundle's registered copy, or None."""
    uri = init_tracking(tracking_uri)
    client = MlflowClient(uri)
    name = registered_name(bundle.family.name)
    try:
        versions = client.search_model_versions(f"name='{name}'")
    except MlflowException:
        return None
    target = str(bundle.path.resolve())
    for mv in versions:
        if (mv.tags or {}).get("bundle_path") and str(Path(mv.tags["bundle_path"]).resolve()) == target:
            return client, name, str(mv.version)
    return None


def promote(model_store, version: str, *, note: str, db_url: str | None = None, tracking_uri: str | None = None,
            track: bool = True) -> dict:
    """Put ``version`` of ``model_store`` in service; returns the record written."""
    store = _store(model_store)
    return _move(store, str(version), action="promote", note=note, db_url=db_url, tracking_uri=tracking_uri,
                 track=track)


def rollback(model_store, *, note: str, db_url: str | None = None, tracking_uri: str | None = None,
             track: bool = True) -> dict:
    """Put back the version that was in service before the last move; returns the record written."""
    store = _store(model_store)
    log = service_log(store)
    if not log:
        raise InputError(f"model store {str(store)!r} has no recorded move to roll back (no {SERVICE_LOG}); "
                         "use `waneguide promote --version vNNN` to choose a version")
    previous = log[-1]["from_version"]
    return _move(store, previous, action="rollback", note=note, db_url=db_url, tracking_uri=tracking_uri,
                 track=track)
