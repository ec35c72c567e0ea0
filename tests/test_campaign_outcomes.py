"""Campaigns: a deliberately harsh protocol on a handful of simulated fibres, and the
same campaign on 1 worker, 2 worker processes and a local Dask cluster.

What is set. The simulated stand-B with 500 emitters per fibre and a weakly cooled contact
(``contact_conductance_w_k`` 0.5e-9 W/K; fibre + contact resistance 250 ohm, the model's
defaults); the protocol ramps at 50 V/s to 1400 V, dwells 15 s and comes back, with a
10 uA current ceiling. Campaign seed 3, six fibres; fibre k's stream is
``SeedSequence(3).spawn(6)[k]``.

Why the numbers hold (from the model's own equations, simulators.cathode): the contact
heats as a lumped node, steady rise dT = I^2 R / G with R = 250 ohm and G = 0.5e-9 W/K, and
the fibre is lost when it passes contact_melting_k = 456 K from 295 K (dT = 161 K). That
takes a sustained I = sqrt(161 G / R) = 18 uA. Unguarded, the supply's limit is the rig's
100 uA and every one of these fibres passes 18 uA well below 1400 V, so it is lost within
a few contact time constants (5 s). Guarded, the supply's own limit is 1.3 x 10 uA = 13 uA
(drivers.roles.hardware_limits) and the watchdog stops the run at the ceiling or earlier:
at 13 uA the contact can rise by at most 84 K, so no guarded fibre can be lost, and any
excursion above the ceiling lasts about a sample (0.5 s), short beside 5 s.

This is self-consistency of the cathode model and the watchdog on simulated fibres, not a
proof that real fibres are protected.

Identity across workers: each fibre's result depends only on its seed, and results are
put in fibre order, so the three executions must agree exactly (on one build).
"""
import pytest

from sequencer import campaign as C
from tests.replay_support import HARSH, harsh_cathode, sim_rig, write

SEED = 3
FIBRES = 6
PROTOCOL = HARSH.format(to="1400 V", dwell="15 s")
CATHODE = harsh_cathode(500)


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("campaign")
    return write(tmp, "harsh.yaml", PROTOCOL), sim_rig(tmp, CATHODE)


@pytest.fixture(scope="module")
def serial(inputs):
    print(f"campaign seed {SEED}, {FIBRES} fibres")
    return C.run_campaign(*inputs, FIBRES, seed=SEED, workers=1)


def test_seeds_come_from_spawned_seed_sequences():
    import numpy as np
    seeds = C.fibre_seeds(SEED, 4)
    # the k-th fibre's seed is the first word of the k-th spawned child, whatever N is
    assert seeds == C.fibre_seeds(SEED, 6)[:4]
    assert seeds[2] == int(np.random.SeedSequence(SEED).spawn(3)[2].generate_state(1)[0])
    assert len(set(seeds)) == 4


def test_harsh_protocol_unguarded_loses_most_fibres_guarded_none(serial):
    g, u = serial.summary["guarded"], serial.summary["unguarded"]
    print(serial.summary)
    # unguarded: most fibres lost (the model says all of them should pass 18 uA)
    assert u["fibres_lost"] >= FIBRES - 1
    # guarded: none, and every guarded run was ended by the watchdog, off confirmed
    assert g["fibres_lost"] == 0
    assert all(f["guarded"]["outcome"] in ("tripped", "ramped-down") for f in serial.fibres)
    assert g["all_confirmed_off"] and u["all_confirmed_off"]
    # the guarded current never reached the level that melts the contact (18 uA)
    assert g["max_peak_current_a"] < 18e-6 < u["max_peak_current_a"]
    # where both happen on one fibre, the watchdog stopped before the unguarded loss
    # ... or the guarded run was stopped by a rule acting at lower current
    for f in serial.fibres:
        assert f["guarded"]["rule"] is not None
        assert f["guarded"]["stop_voltage_v"] is not None


def test_same_results_on_two_worker_processes(inputs, serial):
    two = C.run_campaign(*inputs, FIBRES, seed=SEED, workers=2)
    assert two.where == "local process pool of 2"
    assert two.results() == serial.results()


def test_same_results_on_a_local_dask_cluster(inputs, serial):
    distributed = pytest.importorskip("distributed")
    # in-process workers (threads) over TCP on 127.0.0.1, a free port, no dashboard: two
    # engines run at once in one process, so this also shows they share no state
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  protocol="tcp://", host="127.0.0.1", scheduler_port=0,
                                  dashboard_address=None) as cluster:
        on_dask = C.run_campaign(*inputs, FIBRES, seed=SEED, dask=cluster.scheduler_address)
    assert on_dask.results() == serial.results()


def test_campaign_cli_writes_json_and_png_and_refuses_bad_counts(inputs, tmp_path, capsys):
    from sequencer.cli import main
    proto, rig = inputs
    code = main(["campaign", str(proto), "--fibres", "0", "--rig", str(rig)])
    assert code == 2 and "--fibres must be at least 1" in capsys.readouterr().err
    code = main(["campaign", str(proto), "--fibres", "1", "--rig", str(rig), "--workers", "1",
                 "--seed", str(SEED), "--quiet", "--out", str(tmp_path / "c")])
    out = capsys.readouterr().out
    assert code == 0
    import json
    doc = json.loads((tmp_path / "c" / "campaign.json").read_text())
    assert doc["campaign"]["seed"] == SEED and len(doc["fibres"]) == 1
    assert doc["fibres"][0]["seed"] == C.fibre_seeds(SEED, 1)[0]
    assert (tmp_path / "c" / "campaign.png").stat().st_size > 1000
    assert "fibres lost" in out and "not protection of real fibres" in out


def test_same_results_on_a_local_dask_cluster_of_one_worker_process(inputs, serial):
    distributed = pytest.importorskip("distributed")
    # one worker in its own process: the jobs and results cross a process boundary
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        on_dask = C.run_campaign(*inputs, FIBRES, seed=SEED, dask=cluster.scheduler_address)
    assert on_dask.results() == serial.results()
