"""Ensembles (``members``): policies trained from different seeds answer with their mean probabilities.

Reference for the arithmetic: an ensemble's predictive distribution is the plain mean of its
members' predictive distributions (Lakshminarayanan, Pritzel & Blundell 2017, "Simple and
Scalable Predictive Uncertainty Estimation using Deep Ensembles", section 2.4; cited from
memory).  The facts and questions of the training tests are invented (tests/helpers.py).
"""
from __future__ import annotations

import os

import numpy as np
import pytest

import hopper
from helpers import TINY as _TINY, make_tiny_store, same_params
from hopper import policy as pol
from hopper.env import Walker, candidates, pad_candidates
from hopper.errors import InputError
from hopper.search import beam_search

TINY = {k: v for k, v in _TINY.items() if k != "members"}  # these tests set members themselves


def _setup(graph, seed=0):
    rng = np.random.default_rng(seed)
    q = rng.standard_normal(16).astype(np.float32)
    q /= np.linalg.norm(q)
    starts = [graph.entity_index("a"), graph.entity_index("b")]
    walkers = [Walker(s, (), (s,)) for s in starts]
    batch = pad_candidates([candidates(graph, w, q, 0, 3, frozenset(starts)) for w in walkers])
    n = len(walkers)
    return q, batch, n, rng


def test_mixture_is_the_mean_of_the_members_probabilities(tiny_graph):
    q, batch, n, rng = _setup(tiny_graph)
    relmap = np.arange(len(tiny_graph.relation_names))
    members = [pol.init_params(16, 8, len(relmap), 3, seed=s) for s in (1, 2, 3)]
    for P in members:  # trained-looking weights: the priors alone make members alike
        P["W_q"] = rng.standard_normal(P["W_q"].shape).astype(np.float32)
        P["W_v"] = rng.standard_normal(P["W_v"].shape).astype(np.float32)
    xs = [np.repeat(pol.question_features(P, q, None)[None], n, 0) for P in members]
    hs = [rng.standard_normal((n, 8)).astype(np.float32) * 0.1 for _ in members]
    hop = np.zeros(n, int)
    one = [pol.step(P, pol.NumpyOps, tiny_graph, relmap, x, h, hop, batch)
           for P, x, h in zip(members, xs, hs)]
    probs = [np.exp(lp) for lp, _ in one]
    assert not np.allclose(probs[0], probs[1], atol=1e-3)  # the members do disagree
    mix, reprs = pol.mixture_step(members, pol.NumpyOps, tiny_graph, relmap, xs, hs, hop, batch)
    real = np.concatenate([np.ones((n, 1), bool), batch["mask"]], 1)
    assert np.allclose(np.exp(mix)[real], np.mean(probs, 0)[real], atol=1e-6)
    assert np.allclose([np.exp(mix[i][real[i]]).sum() for i in range(n)], 1.0, atol=1e-6)
    for (_, c), r in zip(one, reprs):  # each member keeps its own candidate representations
        assert np.array_equal(np.asarray(c[:, 0]), np.asarray(r[:, 0]))
    # one member: exactly ``step``, number for number
    lp1, _ = pol.mixture_step(members[:1], pol.NumpyOps, tiny_graph, relmap, xs[:1], hs[:1], hop, batch)
    assert np.array_equal(lp1, one[0][0])


def test_an_ensemble_of_one_policy_twice_answers_as_that_policy(tiny_graph):
    """Two identical members average to the member itself: same ranking, same scores."""
    from hopper.env import Episode

    q, _, _, rng = _setup(tiny_graph, seed=4)
    P = pol.init_params(16, 8, len(tiny_graph.relation_names), 3, seed=7)
    P["W_q"] = rng.standard_normal(P["W_q"].shape).astype(np.float32)
    settings = {"relations": list(tiny_graph.relation_names), "max_hops": 3}
    ep = Episode(q, q, [tiny_graph.entity_index("a")])
    single = beam_search(tiny_graph, pol.Policy(P, settings), ep)
    double = beam_search(tiny_graph, pol.Policy(P, settings, members=[P]), ep)
    assert [e for e, _ in single.ranked] == [e for e, _ in double.ranked]
    assert np.allclose([s for _, s in single.ranked], [s for _, s in double.ranked], atol=1e-6)


def test_members_are_trained_stored_and_read_back(tmp_path):
    hp, questions = make_tiny_store(tmp_path)
    summary = hp.train(questions, seed=0, epochs=2, members=2, workers=1, **TINY)
    assert [m["seed"] for m in summary["members"]][0] == 0 and len(summary["members"]) == 2
    assert summary["members"][1]["seed"] != 0
    assert summary["epochs"] == sum(m["epochs"] for m in summary["members"])
    with hp.store.connect() as con:
        policy = pol.Policy.read(con)
    assert len(policy.members) == 2 and policy.settings["members"] == 2
    assert not same_params(policy.members[0], policy.members[1])  # two seeds, two policies
    # the first member is the policy a one-member run with the same seed trains
    alone = hp.train(questions, seed=0, epochs=2, members=1, **TINY)
    with hp.store.connect() as con:
        single = pol.Policy.read(con, alone["version"])
    assert len(single.members) == 1
    assert same_params(single.params, policy.members[0])
    out = hopper.open_store(hp.path).ask("Who makes the Kessel part 03?", record=False)
    assert "answer" in out


def test_members_out_of_range_is_refused(tmp_path):
    hp, questions = make_tiny_store(tmp_path)
    with pytest.raises(InputError) as e:
        hp.train(questions, members=0, **TINY)
    assert e.value.field == "members"


class Interrupt(Exception):
    pass


def _members(hp, version):
    with hp.store.connect() as con:
        return pol.Policy.read(con, version).members


def test_members_side_by_side_give_the_policy_trained_one_at_a_time(tmp_path, capsys):
    """Each member's numbers depend only on its seed, not on the process that trained it."""
    hp, questions = make_tiny_store(tmp_path)
    lines = []
    apart = hp.train(questions, seed=1, epochs=2, members=3, workers=2, log=lines.append,
                     **(TINY | {"progress": True}))
    assert any("side by side in 2 processes" in m for m in lines)
    # one progress bar for the members in their processes, counting every batch they trained
    done = sum(m["epochs"] for m in apart["members"]) * -(-apart["train_questions"] // 8)
    bar = capsys.readouterr().err.replace("\r", "\n").strip().splitlines()[-1]
    assert bar.startswith("training 3 members") and f" {done}/{done} " in bar
    alone = hp.train(questions, seed=1, epochs=2, members=3, workers=1, **TINY)
    a, b = _members(hp, apart["version"]), _members(hp, alone["version"])
    assert len(a) == 3 and all(same_params(x, y) for x, y in zip(a, b))
    assert apart["valid_hits1"] == alone["valid_hits1"] and apart["threshold"] == alone["threshold"]


def test_a_run_interrupted_after_a_member_finished_side_by_side_skips_it_on_resume(tmp_path):
    hp, questions = make_tiny_store(tmp_path)
    settings = dict(seed=5, epochs=2, members=3, workers=2, **TINY)
    full = hp.train(questions, **settings)

    def stop_after_first_done(message):
        if " done: " in message:
            raise Interrupt

    with pytest.raises(Interrupt):
        hp.train(questions, log=stop_after_first_done, **settings)
    lines = []
    resumed = hopper.open_store(hp.path).train(questions, resume=True, log=lines.append, **settings)
    started = [m for m in lines if m.startswith("training members")]
    assert len(started) == 1 and started[0].count(",") == 1  # two of three members left
    a, b = _members(hp, full["version"]), _members(hp, resumed["version"])
    assert len(b) == 3 and all(same_params(x, y) for x, y in zip(a, b))


def test_a_run_interrupted_in_its_second_member_resumes_to_the_same_policy(tmp_path):
    hp, questions = make_tiny_store(tmp_path)
    settings = dict(seed=2, epochs=2, members=2, workers=1, **TINY)
    full = hp.train(questions, **settings)

    def stop_in_member_2(message):
        if message.startswith("member 2 of 2"):
            stop_in_member_2.seen = True
        elif getattr(stop_in_member_2, "seen", False) and message.startswith("epoch 1:"):
            raise Interrupt

    with pytest.raises(Interrupt):
        hp.train(questions, log=stop_in_member_2, **settings)
    lines = []
    resumed = hopper.open_store(hp.path).train(questions, resume=True, log=lines.append, **settings)
    assert not any(m.startswith("member 1 of 2") for m in lines)  # the first is not trained again
    with hp.store.connect() as con:
        a, b = pol.Policy.read(con, full["version"]), pol.Policy.read(con, resumed["version"])
    assert all(same_params(x, y) for x, y in zip(a.members, b.members)) and len(b.members) == 2
    assert resumed["valid_hits1"] == full["valid_hits1"]


def _stat(pid) -> list | None:
    """The fields of /proc/PID/stat after the command name (state first, then the parent's
    pid); None when the process is gone."""
    try:
        with open(f"/proc/{pid}/stat", encoding="utf-8") as f:
            return f.read().rsplit(")", 1)[1].split()
    except OSError:
        return None


def _children(pid: int) -> list:
    """Processes whose parent is ``pid``."""
    return [int(p) for p in os.listdir("/proc")
            if p.isdigit() and (st := _stat(p)) is not None and int(st[1]) == pid]


def _usable_cores() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


@pytest.mark.skipif(not os.path.isdir("/proc/self") or _usable_cores() < 2,
                    reason="needs Linux /proc and two cores (members train side by side)")
def test_members_training_side_by_side_die_with_a_killed_train(tmp_path):
    """SIGKILL cannot be caught: the members' processes ask the kernel to kill them with their
    parent (PR_SET_PDEATHSIG), so a killed ``train`` leaves nothing training on.  The kill
    comes as soon as both processes exist, often before they were given a member to train:
    those must go too (asking only when a member starts left them waiting for ever)."""
    import signal
    import subprocess
    import time

    from helpers import REPO, hopper_cmd, hopper_env

    hp, questions = make_tiny_store(tmp_path)
    proc = subprocess.Popen(hopper_cmd("train", "--questions", questions, "--epochs", "10000",
                                       "--members", "2", "--store", hp.path),
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            env=hopper_env(), cwd=REPO)
    deadline = time.monotonic() + 300
    kids = []
    while len(kids) < 2 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.2)
        kids = _children(proc.pid)
    assert len(kids) >= 2, "the members did not start side by side"
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    deadline = time.monotonic() + 30
    alive = kids
    while alive and time.monotonic() < deadline:
        time.sleep(0.2)
        alive = [k for k in kids if (st := _stat(k)) is not None and st[0] != "Z"]
    assert not alive, f"member processes {alive} outlived the killed train"
