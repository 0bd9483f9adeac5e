"""Which version is in service, and moving it (issue 11 "one rule"; issue 13 promote / rollback)."""
from __future__ import annotations

import io
import json
from contextlib import redirect_stderr, redirect_stdout

import pytest

from waneguide.cli.main import main
from waneguide.core.errors import InputError
from waneguide.models.bundle import IN_SERVICE_FILE, load_bundle, set_in_service
from waneguide.operations.history import History
from waneguide.operations.service import SERVICE_LOG, in_service, promote, rollback, service_log


@pytest.fixture(scope="module")
def store(tmp_path_factory, family_fb2):
    """A store with two versions (the second an unpromoted challenger), trained small, no MLflow."""
    from waneguide.simulation.campaign import run_campaign
    from waneguide.training.pipeline import TrainConfig, train_model

    work = tmp_path_factory.mktemp("service")
    run_campaign(family_fb2, 200, work / "campaign", seed=3, n_jobs=1, progress=False)
    cfg = TrainConfig(n_estimators=40, gp_points=80, n_jobs=1)
    first = train_model(family_fb2, work / "campaign", work / "store", random_state=0, progress=False,
                        shift_study=False, config=cfg)
    set_in_service(work / "store", first.bundle_path.name)  # what `train` does after registering
    train_model(family_fb2, work / "campaign", work / "store", random_state=1, progress=False,
                shift_study=False, config=cfg)  # v002 saved, not put in service (like a challenger)
    return work / "store"


def test_a_store_serves_its_in_service_version_not_the_newest(store):
    # issue 11: `--model DIR` served the newest folder on disk while the registry said v001
    assert (store / "v002").is_dir()
    assert load_bundle(store).version == "v001" == in_service(store)


def test_promote_and_rollback_move_it_and_keep_a_record(store, tmp_path):
    db = f"sqlite:///{tmp_path / 'h.db'}"
    with pytest.raises(InputError, match="needs a note"):
        promote(store, "v002", note="  ", db_url=db, track=False)
    with pytest.raises(InputError, match="no version 'v009'"):
        promote(store, "v009", note="typo", db_url=db, track=False)
    rec = promote(store, "v002", note="audit 2026-11 recalibrated", db_url=db, track=False)
    assert (rec["from_version"], rec["to_version"]) == ("v001", "v002")
    assert load_bundle(store).version == "v002"
    back = rollback(store, note="challenger misread P03", db_url=db, track=False)
    assert (back["from_version"], back["to_version"]) == ("v002", "v001")
    assert (store / IN_SERVICE_FILE).read_text().strip() == "v001"
    log = service_log(store)
    assert [r["action"] for r in log[-2:]] == ["promote", "rollback"] and log[-1]["note"] == "challenger misread P03"
    assert all(r["os_user"] for r in log)
    changes = History(db).service_changes()
    assert list(changes["action"]) == ["promote", "rollback"]
    assert list(changes["to_version"]) == ["v002", "v001"]
    # the store's log is appended to, never rewritten: one JSON object per line
    lines = (store / SERVICE_LOG).read_text().splitlines()
    assert [json.loads(x)["action"] for x in lines][-2:] == ["promote", "rollback"]


def test_cli_promote_requires_a_note_and_says_what_moved(store, tmp_path):
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err), pytest.raises(SystemExit):
        main(["promote", "--model", str(store), "--version", "v002"])  # --note is required
    assert "--note" in err.getvalue()
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        rc = main(["promote", "--model", str(store), "--version", "v002", "--note", "cli check",
                   "--db", f"sqlite:///{tmp_path / 'h.db'}", "--no-tracking"])
    assert rc == 0, err.getvalue()
    assert "-> v002 in service" in out.getvalue()
    with redirect_stdout(io.StringIO()):
        main(["rollback", "--model", str(store), "--note", "back", "--db", f"sqlite:///{tmp_path / 'h.db'}",
              "--no-tracking"])
    assert in_service(store) == "v001"
