"""The wall-time budget (train.seconds): when a run stops, what it keeps, and the schedule it follows.

Time is simulated: ``time.perf_counter`` is replaced by a clock that advances a fixed amount per reading, so
where the budget runs out depends on the code path only, not on the machine's speed or load.
"""

import csv
import itertools
import math
import time

import pytest
from tiny_train import fit, tiny

from fcnkit import Model
from fcnkit.budget import SAVE_SECONDS, VALIDATION_PIXEL_COST, TimeBudget
from fcnkit.cli import main
from fcnkit.data.scenes import make_scenes
from fcnkit.schedules import lr_factor

pytestmark = pytest.mark.usefixtures("torch_one_thread")


@pytest.fixture(scope="module")
def scenes(tmp_path_factory):
    return make_scenes(tmp_path_factory.mktemp("data") / "scenes", count=3, size=48, seed=7)


def _fake_clock(monkeypatch, tick: float) -> None:
    ticks = itertools.count()
    monkeypatch.setattr(time, "perf_counter", lambda: next(ticks) * tick)


def test_no_budget_changes_nothing():
    b = TimeBudget(0.0, used_before=1e6)
    b.note_step(1e6, 1.0)
    assert not b.active and not b.must_stop(10**6)
    assert b.schedule_step(7, 100, 10**6) == 7.0


def test_stops_when_one_more_step_and_the_closing_would_overrun(monkeypatch):
    _fake_clock(monkeypatch, 1.0)  # readings 0, 1, 2, ...
    b = TimeBudget(10.0, used_before=2.0)  # start = reading 0
    assert b.used() == 3.0  # reading 1
    b.closing = 3.0
    b.note_step(3.0, 0.0)
    assert not b.must_stop(100)  # reading 2: used 4, and 4 + 3 + 3 = 10 fits exactly
    b.closing = 3.5
    assert b.must_stop(100)  # reading 3: used 5, and 5 + 3 + 3.5 > 10
    b.note_step(0.5, 0.0)  # the smaller of the last two steps is the estimate: one slow step is not the rule
    assert not b.must_stop(100)  # reading 4: used 6, and 6 + 0.5 + 3.5 = 10 fits
    b.note_step(2.0, 0.0)  # the last two are now 0.5 and 2 s
    assert b.must_stop(100)  # reading 5: used 7, and 7 + 0.5 + 3.5 > 10


def test_closing_is_measured_once_known_and_estimated_before():
    b = TimeBudget(10.0)
    assert b.closing_estimate(1000) == SAVE_SECONDS  # no step yet
    b.note_step(1.0, 3e-4)
    b.note_step(1.0, 1e-4)
    assert b.closing_estimate(1000) == pytest.approx(VALIDATION_PIXEL_COST * 0.1 + SAVE_SECONDS)
    b.closing = 0.7
    assert b.closing_estimate(1000) == 0.7
    b.calibration = 0.4  # the temperature fit after training is part of the closing
    assert b.closing_estimate(1000) == pytest.approx(1.1)


def test_calibration_time_counts_against_the_budget(monkeypatch):
    _fake_clock(monkeypatch, 1.0)
    b = TimeBudget(10.0, closing=3.0)  # start = reading 0
    b.note_step(1.0, 0.0)
    assert not b.must_stop(100)  # reading 1: 1 + 1 + 3 = 5 fits
    b.calibration = 4.5
    assert b.must_stop(100)  # reading 2: 2 + 1 + 3 + 4.5 > 10


def test_schedule_follows_time_and_the_cosine_ends_with_the_budget(monkeypatch):
    _fake_clock(monkeypatch, 1.0)
    b = TimeBudget(22.0, start=-1.0, closing=2.0)  # 20 s of training, 2 s of closing; started 1 s before reading 0
    # reading 0: 1/20 of the training time used, so 1/20 of the 400 planned steps, ahead of the 3 taken
    assert b.schedule_step(3, 400, 100) == pytest.approx(20.0)
    # reading 1: time alone, however many steps were taken (the budget, not epochs, sets the run's length)
    assert b.schedule_step(300, 400, 100) == pytest.approx(40.0)
    for _ in range(30):
        b.used()
    total, warmup = 400, 40
    end = b.schedule_step(5, total, 100)  # past the budget: the end of the plan, not beyond
    assert end == total
    # reference: the closed form of torch.optim.lr_scheduler.CosineAnnealingLR, (1 + cos(pi t)) / 2 at t = 1
    assert lr_factor(end, total, warmup, "cosine") == pytest.approx(0.5 * (1 + math.cos(math.pi)), abs=1e-12)


def test_budget_stops_the_run_and_keeps_the_best_model(scenes, tmp_path, monkeypatch):
    # 1000 planned epochs, 20 simulated seconds: time, not epochs, must end the run
    cfg = tiny(train={"epochs": 1000, "seconds": 20.0, "schedule": "cosine", "warmup": 0})
    _fake_clock(monkeypatch, 0.01)
    result = fit(cfg, scenes, tmp_path / "run", progress=False)
    used = time.perf_counter()  # the fake clock's reading just after the run
    assert result.out_of_time and not result.stopped_early and 1 <= result.epochs < 1000
    assert used <= 20.0 + 5 * 0.01  # within the budget, but for a few readings of bookkeeping after the closing
    rows = list(csv.DictReader((tmp_path / "run" / "metrics.csv").open()))
    assert len(rows) == result.epochs
    assert float(rows[-1]["lr"]) < 0.05 * cfg["train"]["lr"]  # the cosine had nearly reached zero at the last step
    best = max(range(len(rows)), key=lambda i: float(rows[i]["val_mean_iou"])) + 1
    kept = Model.load(result.model_path)
    assert result.best_epoch == best and kept.extra["epoch"] == best
    assert kept.extra["calibration"]["fitted"]  # calibrated within the budget
    again = fit(cfg, scenes, tmp_path / "run", resume=True, progress=False)  # a spent budget stays spent
    assert again.out_of_time and again.epochs == result.epochs


def test_budget_trains_past_the_configs_epochs_until_it_runs_out(scenes, tmp_path, monkeypatch):
    # Bug fix: a run with a budget stopped at the config's epochs, leaving up to 40 % of a 40 s budget unused on
    # a fast machine. With a budget the budget alone sets the length, and the schedule still ends with it.
    cfg = tiny(train={"epochs": 1, "seconds": 20.0, "schedule": "cosine", "warmup": 0})
    _fake_clock(monkeypatch, 0.01)
    result = fit(cfg, scenes, tmp_path / "run", progress=False)
    assert result.out_of_time and result.epochs > 1
    rows = list(csv.DictReader((tmp_path / "run" / "metrics.csv").open()))
    assert float(rows[0]["lr"]) > 0.5 * cfg["train"]["lr"]  # one planned epoch stretched over the budget
    assert float(rows[-1]["lr"]) < 0.05 * cfg["train"]["lr"]


def test_budget_shorter_than_set_up_still_trains_one_step_and_saves(scenes, tmp_path, monkeypatch):
    cfg = tiny(train={"epochs": 5, "seconds": 0.001})
    _fake_clock(monkeypatch, 0.01)
    result = fit(cfg, scenes, tmp_path / "run", progress=False)
    assert result.out_of_time and result.epochs == 1 and result.model_path.is_file()
    assert Model.load(result.model_path).extra["epoch"] == 1


def test_cli_seconds_sets_the_budget(scenes, tmp_path, capsys):
    from tiny_train import write_toml

    write_toml(tmp_path / "c.toml", tiny(train={"epochs": 1000}))
    assert main(["train", str(tmp_path / "c.toml"), "--data", str(scenes), "--out", str(tmp_path / "r"),
                 "--seconds", "0.5", "--quiet"]) == 0
    assert "out of time" in capsys.readouterr().out
    assert Model.load(tmp_path / "r" / "model.safetensors").config["train"]["seconds"] == 0.5
    assert main(["train", str(tmp_path / "c.toml"), "--data", str(scenes), "--out", str(tmp_path / "r2"),
                 "--seconds", "-1"]) == 2
    assert "train.seconds" in capsys.readouterr().err
