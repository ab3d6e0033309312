"""Reads an NWB file written by `auspex export --nwb` with the standard's reference API (pynwb)
and checks it against what Auspex says it wrote (a JSON file the test writes): every unit with
its spike count and times, every trial with its onset, stimulus and decision, and the per-bin
posterior's shape. Exits non-zero, naming the difference, when anything is missing or differs.

Usage: python read_back.py FILE.nwb EXPECTED.json
"""
import json
import sys

import numpy as np
from pynwb import NWBHDF5IO

path, expected_path = sys.argv[1], sys.argv[2]
want = json.load(open(expected_path))
fail = []
with NWBHDF5IO(path, "r") as io:
    nwb = io.read()
    units = nwb.units
    ids = list(units.id[:])
    if ids != want["units"]:
        fail.append(f"unit ids {ids[:10]}... != {want['units'][:10]}...")
    for row, uid in enumerate(ids):
        times = np.asarray(units["spike_times"][row])
        w = want["spikes"][str(uid)]
        if len(times) != len(w) or not np.allclose(times, w, rtol=0, atol=1e-9):
            fail.append(f"unit {uid}: {len(times)} spike times, expected {len(w)}")
    trials = nwb.trials.to_dataframe()
    if list(trials.index) != want["trials"]:
        fail.append("trial ids differ")
    if not np.allclose(trials["start_time"].to_numpy(), want["onsets"], rtol=0, atol=1e-9):
        fail.append("trial onsets differ")
    if list(trials["stimulus"]) != want["stimuli"]:
        fail.append("presented stimuli differ")
    if list(trials["decided_stimulus"]) != want["decided"]:
        fail.append("decisions differ")
    post = np.stack(trials["decision_posterior"].to_numpy())
    if post.shape != (len(want["trials"]), len(want["model_stimuli"])):
        fail.append(f"decision posterior shape {post.shape}")
    series = nwb.processing["auspex"]["posterior"]
    if tuple(series.data.shape) != (want["frames"], len(want["model_stimuli"])):
        fail.append(f"posterior series shape {series.data.shape}, expected {want['frames']} rows")
    print(f"pynwb read {path}: {len(ids)} units, {sum(len(units['spike_times'][r]) for r in range(len(ids)))} spikes, "
          f"{len(trials)} trials, {sum(1 for d in trials['decided_stimulus'] if d)} decisions, "
          f"{series.data.shape[0]} posterior rows")
if fail:
    print("\n".join(fail))
    sys.exit(1)
