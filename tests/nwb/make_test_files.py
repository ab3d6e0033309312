"""Writes the NWB test files Auspex reads, with the reference API (pynwb, see requirements.txt),
and beside each the same data as Auspex's two CSV tables, so a test can check that reading the
NWB file and reading the tables give the same dataset (and the same fitted model).

The spike trains are invented here (a fixed seed; tuned units firing more after onsets of their
preferred stimulus), in a scenario of our own: a head-fixed animal shown drifting gratings.

Run from this folder:  python make_test_files.py [--large]
"""
import sys
from datetime import datetime, timezone

import numpy as np
from pynwb import NWBFile, NWBHDF5IO

START = datetime(2026, 3, 14, 9, 30, tzinfo=timezone.utc)


def new_file(ident):
    return NWBFile(
        session_description="gratings shown to a head-fixed animal (invented for Auspex's tests)",
        identifier=ident,
        session_start_time=START,
    )


def trains(rng, onsets, labels, n_units, prefs, t_end, base_hz=4.0, driven_hz=40.0, window=0.3):
    """Spike times per unit: background firing plus a burst after onsets of the preferred label."""
    out = []
    for u in range(n_units):
        n_bg = rng.poisson(base_hz * t_end)
        times = list(rng.uniform(0.0, t_end, n_bg))
        for on, lab in zip(onsets, labels):
            rate = driven_hz if lab == prefs[u] else base_hz * 2
            k = rng.poisson(rate * window)
            times += list(on + 0.01 + rng.gamma(2.0, 0.04, k))
        times = np.sort(np.array([t for t in times if 0.0 <= t < t_end]))
        # Round to the microsecond, as acquisition clocks give them.
        out.append(np.round(times, 6))
    return out


def csv_tables(stem, units, trials):
    """units: [(id, times)], trials: [(id, onset, stimulus)]"""
    with open(f"{stem}.spikes.csv", "w") as f:
        f.write("unit,time_s\n")
        for uid, times in units:
            for t in times:
                f.write(f"{uid},{float(t)!r}\n")
    with open(f"{stem}.trials.csv", "w") as f:
        f.write("trial,onset_s,stimulus\n")
        for tid, on, stim in trials:
            f.write(f"{tid},{float(on)!r},{stim}\n")


def schedule(rng, labels, n_trials, first=1.0, gap=1.0):
    onsets = np.round(first + gap * np.arange(n_trials) + rng.uniform(0, 0.2, n_trials), 6)
    chosen = [labels[i % len(labels)] for i in rng.permutation(n_trials)]
    return onsets, chosen


def string_stimulus(rng):
    labels = ["left", "right", "up"]
    onsets, chosen = schedule(rng, labels, 36)
    t_end = float(onsets[-1] + 2.0)
    sp = trains(rng, onsets, chosen, 3, ["left", "right", "up"], t_end)
    nwb = new_file("auspex-test-string")
    nwb.add_trial_column(name="stimulus", description="grating drift, as a word")
    for on, lab in zip(onsets, chosen):
        nwb.add_trial(start_time=float(on), stop_time=float(on) + 0.5, stimulus=lab)
    for times in sp:
        nwb.add_unit(spike_times=times)
    with NWBHDF5IO("string_stimulus.nwb", "w") as io:
        io.write(nwb)
    csv_tables("string_stimulus", list(enumerate(sp)),
               [(i, on, lab) for i, (on, lab) in enumerate(zip(onsets, chosen))])


def numeric_stimulus(rng):
    labels = [0.0, 45.0, 90.0, 135.0, 22.5]
    onsets, chosen = schedule(rng, labels, 40)
    t_end = float(onsets[-1] + 2.0)
    sp = trains(rng, onsets, chosen, 4, [0.0, 45.0, 90.0, 22.5], t_end)
    nwb = new_file("auspex-test-numeric")
    nwb.add_trial_column(name="direction_deg", description="drift direction, degrees")
    for on, lab in zip(onsets, chosen):
        nwb.add_trial(start_time=float(on), stop_time=float(on) + 0.5, direction_deg=lab)
    # Unit ids of the lab's own numbering, not 0..n.
    ids = [12, 7, 30, 31]
    for uid, times in zip(ids, sp):
        nwb.add_unit(spike_times=times, id=uid)
    with NWBHDF5IO("numeric_stimulus.nwb", "w") as io:
        io.write(nwb)
    # A float label prints as Rust prints an f64: 90.0 as "90", 22.5 as "22.5".
    fmt = lambda x: str(int(x)) if float(x).is_integer() else repr(float(x))
    csv_tables("numeric_stimulus", list(zip(ids, sp)),
               [(i, on, fmt(lab)) for i, (on, lab) in enumerate(zip(onsets, chosen))])


def units_partway(rng):
    labels = ["a", "b"]
    onsets, chosen = schedule(rng, labels, 30)
    t_end = float(onsets[-1] + 2.0)
    sp = trains(rng, onsets, chosen, 4, ["a", "b", "a", "b"], t_end)
    # Units 2 and 3 were isolated part-way: they have spikes (and observation) only from then on.
    half = float(onsets[15])
    sp[2] = sp[2][sp[2] >= half]
    sp[3] = sp[3][sp[3] >= half]
    quality = ["good", "noise", "good", "good"]
    nwb = new_file("auspex-test-partway")
    nwb.add_trial_column(name="stimulus", description="grating family")
    for on, lab in zip(onsets, chosen):
        nwb.add_trial(start_time=float(on), stop_time=float(on) + 0.5, stimulus=lab)
    nwb.add_unit_column(name="quality", description="the sorter's label")
    for u, times in enumerate(sp):
        first = 0.0 if u < 2 else half
        nwb.add_unit(spike_times=times, quality=quality[u], obs_intervals=[[first, t_end]])
    with NWBHDF5IO("units_partway.nwb", "w") as io:
        io.write(nwb)
    kept = [(u, sp[u]) for u in range(4) if quality[u] == "good"]
    csv_tables("units_partway", kept,
               [(i, on, lab) for i, (on, lab) in enumerate(zip(onsets, chosen))])


def two_tables(rng):
    labels = ["dim", "bright"]
    onsets, chosen = schedule(rng, labels, 24, first=1.0, gap=2.0)
    flash_onsets = np.round(onsets + 1.0, 6)
    flash_labels = [labels[(i + 1) % 2] for i in range(len(onsets))]
    t_end = float(flash_onsets[-1] + 2.0)
    all_on = np.concatenate([onsets, flash_onsets])
    all_lab = list(chosen) + flash_labels
    sp = trains(rng, all_on, all_lab, 3, ["dim", "bright", "dim"], t_end)
    nwb = new_file("auspex-test-two-tables")
    nwb.add_trial_column(name="stimulus", description="grating contrast")
    for on, lab in zip(onsets, chosen):
        nwb.add_trial(start_time=float(on), stop_time=float(on) + 0.5, stimulus=lab)
    from pynwb.epoch import TimeIntervals
    flashes = TimeIntervals(name="flashes", description="full-field flashes between gratings")
    flashes.add_column(name="luminance", description="flash level")
    for on, lab in zip(flash_onsets, flash_labels):
        flashes.add_interval(start_time=float(on), stop_time=float(on) + 0.1, luminance=lab)
    nwb.add_time_intervals(flashes)
    for times in sp:
        nwb.add_unit(spike_times=times)
    with NWBHDF5IO("two_tables.nwb", "w") as io:
        io.write(nwb)
    csv_tables("two_tables_flashes", list(enumerate(sp)),
               [(i, on, lab) for i, (on, lab) in enumerate(zip(flash_onsets, flash_labels))])


def large():
    """400 units x 2 h at 10 spikes/s (~29 M spikes) for the reading benchmark; not committed."""
    rng = np.random.default_rng(400)
    t_end = 7200.0
    n_trials = 3600
    onsets = np.round(1.0 + 2.0 * np.arange(n_trials - 1), 6)
    labels = ["s%d" % (i % 8) for i in range(len(onsets))]
    nwb = new_file("auspex-bench-large")
    nwb.add_trial_column(name="stimulus", description="one of eight")
    for on, lab in zip(onsets, labels):
        nwb.add_trial(start_time=float(on), stop_time=float(on) + 0.5, stimulus=lab)
    sp = []
    for u in range(400):
        times = np.round(np.sort(rng.uniform(0.0, t_end, rng.poisson(10.0 * t_end))), 6)
        nwb.add_unit(spike_times=times)
        sp.append((u, times))
    with NWBHDF5IO("large.nwb", "w") as io:
        io.write(nwb)
    with open("large.spikes.csv", "w") as f:
        f.write("unit,time_s\n")
        for uid, times in sp:
            f.write("".join(f"{uid},{t!r}\n" for t in times.tolist()))
    with open("large.trials.csv", "w") as f:
        f.write("trial,onset_s,stimulus\n")
        for i, (on, lab) in enumerate(zip(onsets, labels)):
            f.write(f"{i},{float(on)!r},{lab}\n")


if __name__ == "__main__":
    if "--large" in sys.argv:
        large()
    else:
        string_stimulus(np.random.default_rng(1))
        numeric_stimulus(np.random.default_rng(2))
        units_partway(np.random.default_rng(3))
        two_tables(np.random.default_rng(4))
