"""The experiment folder: file names, readers, the renames of older folders and job records."""

from __future__ import annotations

import json

from trainkit.core.experiment import LEGACY_NAMES, Experiment


def test_older_folders_are_renamed_once_and_nothing_is_overwritten(tmp_path):
    (tmp_path / "evaluation").mkdir()
    for old in LEGACY_NAMES:
        (tmp_path / old).write_text(f"old {old}")
    (tmp_path / "resume.pt").write_text("new")  # already there: the legacy file stays
    exp = Experiment(tmp_path)
    done = exp.migrate()
    assert sorted(done) == ["config.yaml -> recipe.yaml",
                            "evaluation/confusion_matrix.png -> evaluation/confusion.png"]  # fmt: skip
    assert exp.recipe_path.read_text() == "old config.yaml"
    assert exp.resume_path.read_text() == "new" and (tmp_path / "last.pt").exists()
    assert exp.migrate() == []


def test_readers_and_status_of_a_folder_with_metrics_and_jobs(tmp_path):
    exp = Experiment(tmp_path)
    assert not exp.is_experiment() and exp.read_metrics() is None and exp.read_jobs() == []
    exp.provenance_path.write_text(json.dumps({"workspace": "ws", "training_patches": 12}))
    exp.evaluation_dir.mkdir()
    ci = {"low": 0.5, "high": 0.9}
    exp.metrics_path.write_text(
        json.dumps({"screening": {"recall": 0.75, "recall_interval": ci, "threshold": 0.4}})
    )
    exp.record_job({"job": "a", "summary": "first"})
    exp.record_job({"job": "b", "summary": "second"})
    exp.record_job({"job": "a", "summary": "again"})  # appended: job a's first check stays
    assert [j["summary"] for j in exp.read_jobs()] == ["first", "second", "again"]
    info = exp.status()
    assert exp.is_experiment() and info["training_patches"] == 12
    assert info["screening_recall"] == "0.750 [0.500, 0.900]" and info["threshold"] == 0.4
    assert info["jobs_checked"] == 2 and info["job_checks"] == 3
    assert info["latest_job"] == "a: again"
    assert info["model.onnx"] == "missing"


def test_two_checks_recorded_at_once_both_land(tmp_path, monkeypatch):
    """jobs.json is read, extended and written again: two writers at once (the window
    between read and write widened to 0.5 s) must both land, in either order."""
    import threading
    import time

    exp = Experiment(tmp_path)
    exp.record_job({"job": "first", "summary": "kept"})
    real = Experiment.read_jobs

    def slow_read(self):
        jobs = real(self)
        time.sleep(0.5)
        return jobs

    monkeypatch.setattr(Experiment, "read_jobs", slow_read)

    def at_once(names, **kwargs):
        writers = [
            threading.Thread(target=exp.record_job, args=({"job": n, "summary": n},), kwargs=kwargs)
            for n in names
        ]
        for w in writers:
            w.start()
        for w in writers:
            w.join()

    at_once(("a", "b"))
    assert sorted(j["job"] for j in real(exp)) == ["a", "b", "first"]
    # What runs under the same lock after the write (the model card) sees every check.
    cards = []
    at_once(("c", "d"), then=lambda: cards.append(sorted(j["job"] for j in real(exp))))
    monkeypatch.undo()
    assert cards[-1] == ["a", "b", "c", "d", "first"]


def test_a_torn_json_file_is_one_line_naming_it_not_a_crash(tmp_path, capsys):
    """A metrics.json cut short (a full disk, a copy stopped half way) is the user's to
    fix: `trainkit status` says which file and how to rebuild it, with exit code 2 (user
    error), not 70 (a bug) and not a traceback."""
    from trainkit.cli import main

    exp = Experiment(tmp_path / "exp")
    exp.evaluation_dir.mkdir(parents=True)
    exp.provenance_path.write_text(json.dumps({"workspace": "ws"}))
    exp.metrics_path.write_text('{"screening": {"recall": 0.75, "recall_inter')
    assert main(["status", str(exp.path)]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert err.startswith("trainkit: ") and str(exp.metrics_path) in err
    assert "trainkit evaluate" in err
