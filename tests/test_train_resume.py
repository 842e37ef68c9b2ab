"""Training checkpoints: an interrupted ``train`` leaves the old policy active and ``--resume`` finishes it.

The facts and questions are invented for these tests (parts, their makers and where the makers
are based).  Training settings are tiny so each run takes a few seconds.
"""
from __future__ import annotations

import hashlib
import io
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import hopper
from helpers import (REPO, TINY, cli_driver, hopper_cmd, hopper_env, make_tiny_store, policy_params,
                     run_cli, same_params)
from hopper.errors import InputError


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """The store with a first policy (v1) already trained."""
    hp, questions = make_tiny_store(tmp_path_factory.mktemp("resume"))
    hp.train(questions, seed=0, epochs=1, **TINY)
    return hp, questions


def active_version(hp) -> int:
    return hp.info()["policy"]["version"]


class Interrupt(Exception):
    pass


def last_state(hp, epoch: int):
    """A ``log`` callback that keeps the training state saved after ``epoch`` (the stored
    policy is the best epoch's, which may be an early one; the last state is what resuming
    must reproduce)."""
    kept = {}

    def log(message):
        if message.startswith(f"epoch {epoch}:"):
            with np.load(hp.store.checkpoint_path, allow_pickle=False) as z:
                kept.update({k: z[k] for k in z.files if k.startswith(("param.", "adam."))})
    return log, kept


def same_state(a: dict, b: dict) -> bool:
    return bool(a) and set(a) == set(b) and all(np.array_equal(a[k], b[k]) for k in a)


def test_resumed_run_ends_with_the_same_policy_as_an_uninterrupted_one(tiny):
    """Exact equality: the checkpoint holds parameters, Adam's moments and step counts, the torch
    and numpy generators' states and the question vectors, and training on one thread is
    deterministic, so the resumed run repeats the uninterrupted one number for number."""
    hp, questions = tiny
    settings = dict(seed=3, epochs=4, **TINY)
    log, full_state = last_state(hp, 4)
    full = hp.train(questions, log=log, **settings)
    assert not hp.store.checkpoint_path.exists()  # a finished run leaves no checkpoint

    def stop_after_epoch_2(message):
        if message.startswith("epoch 2:"):
            raise Interrupt

    with pytest.raises(Interrupt):
        hp.train(questions, log=stop_after_epoch_2, **settings)
    assert active_version(hp) == full["version"]  # the interrupted run changed no policy
    with np.load(hp.store.checkpoint_path, allow_pickle=False) as z:  # numeric arrays only
        assert json.loads(z["meta"].tobytes())["epoch"] == 2
        assert {"param.W_q", "best.W_q", "adam.0.exp_avg", "rng.torch_generator"} <= set(z.files)

    fresh = hopper.open_store(hp.path)  # a new handle: nothing carried over in memory
    lines = []
    log, resumed_state = last_state(fresh, 4)
    resumed = fresh.train(questions, resume=True, log=lambda m: (lines.append(m), log(m)), **settings)
    assert lines[0] == "resuming after epoch 2" and lines[1].startswith("epoch 3:")
    assert same_state(full_state, resumed_state)  # weights and Adam's state after the last epoch
    assert resumed["version"] == full["version"] + 1 and active_version(hp) == resumed["version"]
    assert not hp.store.checkpoint_path.exists()
    assert same_params(policy_params(hp, full["version"]), policy_params(hp, resumed["version"]))

    def curve(s):
        return [{k: v for k, v in c.items() if k != "seconds"} for c in s["curve"]]

    assert curve(resumed) == curve(full) and len(curve(full)) == 4
    assert resumed["threshold"] == full["threshold"]


def test_resume_without_restoring_the_generators_would_differ(tiny):
    """The equality above is not automatic: a run restarted from the same parameters and Adam
    state but fresh random generators takes other samples and ends elsewhere."""
    from hopper import train as tr

    hp, questions = tiny
    settings = dict(seed=3, epochs=3, **TINY)
    log, full_state = last_state(hp, 3)
    full = hp.train(questions, log=log, **settings)

    def stop_after_epoch_1(message):
        if message.startswith("epoch 1:"):
            raise Interrupt

    with pytest.raises(Interrupt):
        hp.train(questions, log=stop_after_epoch_1, **settings)
    real_restore = tr.restore

    def restore_but_reseed(checkpoint, opt, gen, rng):
        state = real_restore(checkpoint, opt, gen, rng)
        gen.manual_seed(12345)
        rng.bit_generator.state = np.random.default_rng(12345).bit_generator.state
        return state

    tr.restore = restore_but_reseed
    log, other_state = last_state(hp, 3)
    try:
        other = hp.train(questions, resume=True, log=log, **settings)
    finally:
        tr.restore = real_restore
    assert other_state and not same_state(full_state, other_state)
    assert [c["train_reward"] for c in other["curve"][1:]] != [c["train_reward"] for c in full["curve"][1:]]


# Runs hopper's command line; the process stops itself (SIGSTOP) right after the checkpoint of
# epoch $STOP_AFTER_EPOCH is written, so the test acts on a run that is certainly in progress.
STOP_AFTER_CHECKPOINT = cli_driver("""
    import os, signal
    from hopper import store

    real = store.Store.save_checkpoint

    def save_checkpoint(self, arrays, meta):
        real(self, arrays, meta)
        if meta.get("epoch") == int(os.environ["STOP_AFTER_EPOCH"]):
            os.kill(os.getpid(), signal.SIGSTOP)

    store.Store.save_checkpoint = save_checkpoint
""")


def _checkpoint_epoch(path: Path) -> int:
    with np.load(path, allow_pickle=False) as z:
        return int(json.loads(z["meta"].tobytes())["epoch"])


def wait_until_stopped(proc: subprocess.Popen, timeout: float) -> None:
    """Wait for ``proc`` to stop itself (SIGSTOP); fail if it exits or ``timeout`` s pass."""
    deadline = time.monotonic() + timeout
    while True:
        pid, status = os.waitpid(proc.pid, os.WNOHANG | os.WUNTRACED)
        if pid and os.WIFSTOPPED(status):
            return
        if pid:  # it exited: let Popen know how
            proc.returncode = os.waitstatus_to_exitcode(status)
            pytest.fail(f"the process ended (status {proc.returncode}) before stopping")
        assert time.monotonic() < deadline, f"the process did not stop within {timeout:.0f} s"
        time.sleep(0.05)


def test_train_killed_with_sigkill_keeps_the_old_policy_and_resume_finishes(tiny):
    hp, questions = tiny
    old = active_version(hp)
    n_versions = hp.info()["policy"]["versions"]
    store, cp = hp.path, hp.store.checkpoint_path
    args = ["--questions", questions, "--seed", "1", "--epochs", "8", "--members", "1", "--store", store]
    log = open(store.parent / "train.log", "w+", encoding="utf-8")
    proc = subprocess.Popen([sys.executable, "-c", STOP_AFTER_CHECKPOINT, "train", *map(str, args)],
                            stdout=log, stderr=log, env=hopper_env(STOP_AFTER_EPOCH="1"), cwd=REPO)
    try:
        # the run stops itself once epoch 1 is saved: frozen mid-training, however slow the machine
        wait_until_stopped(proc, timeout=600)
        assert _checkpoint_epoch(cp) == 1
        # ask while the training run is in progress: the last stored policy answers
        ask = subprocess.run(hopper_cmd("ask", "Who makes the Kessel part 05?", "--json", "--store", store),
                             capture_output=True, text=True, env=hopper_env(), cwd=REPO, timeout=120)
        assert ask.returncode == 0, ask.stderr
        assert json.loads(ask.stdout)["policy_version"] == old
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == -signal.SIGKILL
    info = hp.info()
    assert (info["policy"]["version"], info["policy"]["versions"]) == (old, n_versions)
    ask = subprocess.run(hopper_cmd("ask", "Who makes the Kessel part 06?", "--json", "--store", store),
                         capture_output=True, text=True, env=hopper_env(), cwd=REPO, timeout=120)
    assert ask.returncode == 0 and json.loads(ask.stdout)["policy_version"] == old, ask.stderr

    done = subprocess.run(hopper_cmd("train", "--resume", "--json", *args), capture_output=True,
                          text=True, env=hopper_env(), cwd=REPO, timeout=600)
    assert done.returncode == 0, done.stderr
    resumed = json.loads(done.stdout)
    assert resumed["resumed"] is True and resumed["version"] == n_versions + 1
    assert active_version(hp) == n_versions + 1 and not cp.exists()
    # the same settings in one uninterrupted run (in this process) give the same policy, and
    # the same training rewards epoch by epoch (those depend on every sampled walk)
    full = hp.train(questions, seed=1, epochs=8, members=1)
    assert same_params(policy_params(hp, n_versions + 1), policy_params(hp, full["version"]))
    assert [c["train_reward"] for c in resumed["curve"]] == [c["train_reward"] for c in full["curve"]]
    assert len(full["curve"]) == 8


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_resume_refusals_are_one_line_and_change_nothing(tiny, tmp_path):
    hp, questions = tiny
    store, cp = hp.path, hp.store.checkpoint_path
    before = _digest(store)
    rc, out, err = run_cli("train", "--resume", "--questions", questions, "--store", store)
    assert (rc, out) == (2, "") and err.count("\n") == 1, err
    assert "no unfinished training run" in err and "--resume" in err
    # a checkpoint made with other settings
    hp.store.save_checkpoint({"param.W_q": np.zeros((2, 2), np.float32)},
                             {"run": "x", "fingerprint": {"settings": {"seed": 5}}})
    rc, out, err = run_cli("train", "--resume", "--questions", questions, "--seed", "0", "--store", store)
    assert (rc, out) == (2, ""), err
    assert err == (f"hopper: {cp}, field 'seed': the checkpoint was made with 5, this run asks 0 "
                   "(resume with the settings of the interrupted run, or train without --resume)\n")
    # a damaged checkpoint, and one holding a pickled object (never unpickled)
    for data in (b"PK\x03\x04 not really a zip", None):
        if data is None:
            buf = io.BytesIO()
            np.savez(buf, meta=np.array([{"run": "x"}], dtype=object))
            data = buf.getvalue()
        cp.write_bytes(data)
        rc, out, err = run_cli("train", "--resume", "--questions", questions, "--store", store)
        assert rc == 2 and err.count("\n") == 1 and "cannot be read" in err, err
        assert "Traceback" not in err
    cp.unlink()
    assert _digest(store) == before
    with pytest.raises(InputError, match="resume"):
        hp.train(questions, resume="yes")
