//! A recorded dataset in ticks: trials (id, onset tick, presented stimulus) and spikes
//! (unit, tick), plus the one rule that puts a spike into a bin — shared with the daemon — and
//! the chronological event stream that offline decoding, replay and tests feed to the engine.
//!
//! Must not: parse files (the CLI reads CSV and session files into this type).

/// One trial.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Trial {
    /// Trial id (unique within the dataset).
    pub id: u64,
    /// Onset tick.
    pub onset: i64,
    /// Presented stimulus name, if known.
    pub stimulus: Option<String>,
}

/// Trials and spikes on one clock.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Dataset {
    /// Ticks per second.
    pub tick_rate_hz: f64,
    /// Trials, sorted by onset.
    pub trials: Vec<Trial>,
    /// Spikes (tick, unit), sorted. Shared: a subset of the trials (a held-out fold, a
    /// training fold) reads the same spikes instead of copying them.
    pub spikes: crate::SpikeTable,
    /// Every unit id seen in the spike table, plus any declared without spikes, sorted.
    pub units: Vec<u32>,
    /// Units declared part-way through the session (online sorting isolated them): unit → tick
    /// from which it is recorded. Trials with an onset before that tick are not used to fit the
    /// unit (its earlier spikes were never sent, so its silence there is no evidence).
    pub declared_from: std::collections::BTreeMap<u32, i64>,
    /// The order stimuli are listed in (models, reports); stimuli not named here follow in
    /// order of first appearance. Empty: numeric order when every name is a number, else
    /// order of first appearance.
    pub stimulus_order: Vec<String>,
}

/// The bin of `tick` in a trial with `onset`, or None outside [onset, onset + n_bins·bin_ticks).
#[inline]
pub fn bin_of(tick: i64, onset: i64, bin_ticks: i64, n_bins: usize) -> Option<usize> {
    if tick < onset {
        return None;
    }
    let b = (tick - onset) / bin_ticks;
    (b < n_bins as i64).then_some(b as usize)
}

/// Converts seconds to ticks, the one place this happens (on reading).
#[inline]
pub fn seconds_to_ticks(t: f64, tick_rate_hz: f64) -> i64 {
    (t * tick_rate_hz).round() as i64
}

/// Most spikes in one batch that crosses a gap between trial windows.
pub const GAP_BATCH_SPIKES: usize = 65_536;

/// One input to the engine, in the order a live session would deliver it.
#[derive(Clone, Debug, PartialEq)]
pub enum Event {
    /// A trial opens.
    Open {
        /// Trial id.
        trial: u64,
        /// Onset tick.
        onset: i64,
        /// Presented stimulus name.
        stimulus: Option<String>,
    },
    /// A batch of spikes (tick, unit), all after the previous watermark, then the new watermark.
    Batch {
        /// Spikes.
        spikes: Vec<(i64, u32)>,
        /// Everything up to and including this tick has been sent.
        watermark: i64,
    },
}

/// A name from a file or the wire as it may be printed to a terminal or a log: control
/// characters (escape sequences, carriage returns, bells) are shown escaped (`\u{1b}`), so a
/// damaged or hostile file cannot drive the user's terminal; everything else as it is.
pub fn printable(name: &str) -> std::borrow::Cow<'_, str> {
    if name.chars().any(char::is_control) {
        name.chars()
            .map(|c| {
                if c.is_control() {
                    c.escape_default().to_string()
                } else {
                    c.to_string()
                }
            })
            .collect::<String>()
            .into()
    } else {
        name.into()
    }
}

/// Each name's position in `names` (the first, for a repeated name): a lookup in constant
/// time, so that matching trials to stimuli stays linear with tens of thousands of distinct
/// stimuli (a natural-image set).
pub fn name_index(names: &[String]) -> std::collections::HashMap<&str, usize> {
    let mut m = std::collections::HashMap::with_capacity(names.len());
    for (i, n) in names.iter().enumerate() {
        m.entry(n.as_str()).or_insert(i);
    }
    m
}

/// The presentation order of stimuli met in the order `as_met`: `explicit` first (those of
/// its names that occur), then the rest as met; with no explicit order, numeric order when
/// every name is a number; else as met.
pub fn presentation_order(as_met: Vec<String>, explicit: &[String]) -> Vec<String> {
    let v = as_met;
    if !explicit.is_empty() {
        let met: std::collections::HashSet<&str> = v.iter().map(String::as_str).collect();
        let listed: std::collections::HashSet<&str> = explicit.iter().map(String::as_str).collect();
        let mut seen = std::collections::HashSet::new();
        let mut ordered: Vec<String> = explicit
            .iter()
            .filter(|s| met.contains(s.as_str()) && seen.insert(s.as_str()))
            .cloned()
            .collect();
        ordered.extend(v.iter().filter(|s| !listed.contains(s.as_str())).cloned());
        return ordered;
    }
    let numbers: Option<Vec<f64>> = v.iter().map(|s| s.trim().parse::<f64>().ok()).collect();
    if let Some(x) = numbers {
        let mut idx: Vec<usize> = (0..v.len()).collect();
        idx.sort_by(|&a, &b| x[a].total_cmp(&x[b]));
        return idx.into_iter().map(|i| v[i].clone()).collect();
    }
    v
}

impl Dataset {
    /// Stimulus names in the order they are presented (listed, reported, stored in a model):
    /// the dataset's own `stimulus_order` if given, else numeric order when every name is a
    /// number, else the order they are first met in ([`presentation_order`]).
    pub fn stimulus_names(&self) -> Vec<String> {
        presentation_order(self.stimuli_as_met(), &self.stimulus_order)
    }

    /// Stimulus names in the order the trials first show them, trials taken by (onset, id):
    /// the order computations follow, so that no figure depends on how stimuli are named,
    /// listed or stored.
    pub fn stimuli_as_met(&self) -> Vec<String> {
        let mut idx: Vec<usize> = (0..self.trials.len()).collect();
        idx.sort_by_key(|&i| (self.trials[i].onset, self.trials[i].id, i));
        let mut v: Vec<String> = Vec::new();
        let mut seen = std::collections::HashSet::new();
        for i in idx {
            if let Some(s) = &self.trials[i].stimulus {
                if seen.insert(s.as_str()) {
                    v.push(s.clone());
                }
            }
        }
        v
    }

    /// This dataset with its stimuli in the order they are met ([`Dataset::stimuli_as_met`])
    /// — taken by value, so the spikes are not copied.
    pub fn in_met_order(mut self) -> Dataset {
        self.stimulus_order = self.stimuli_as_met();
        self
    }

    /// The last tick any trial window or spike touches, given the window length in ticks.
    pub fn end_tick(&self, window_ticks: i64) -> i64 {
        let t = self
            .trials
            .iter()
            .map(|t| t.onset.saturating_add(window_ticks))
            .max()
            .unwrap_or(0);
        let s = self
            .spikes
            .last()
            .map(|x| x.0.saturating_add(1))
            .unwrap_or(0);
        t.max(s)
    }

    /// The session as an acquisition system would deliver it: batches of `batch_ticks` ticks
    /// (e.g. 1 ms) while a trial window is open and one batch across each gap between windows,
    /// each trial opened in the batch that contains its onset, before that batch.
    pub fn events(&self, batch_ticks: i64, window_ticks: i64) -> Vec<Event> {
        let batch_ticks = batch_ticks.max(1);
        let mut out = Vec::new();
        let start = self
            .trials
            .first()
            .map(|t| t.onset)
            .unwrap_or(0)
            .min(self.spikes.first().map(|s| s.0).unwrap_or(0));
        let end = self.end_tick(window_ticks);
        let mut trials = self.trials.iter().peekable();
        let mut si = 0;
        let mut wm = start.saturating_sub(1);
        // The end (exclusive) of the latest window opened so far.
        let mut open_until = i64::MIN;
        while wm < end {
            let mut next = wm.saturating_add(batch_ticks);
            // Between windows nothing is decoded: one batch up to just before the next onset
            // (at most GAP_BATCH_SPIKES spikes), so a long pause or an onset far ahead costs one
            // message instead of one per bin. Frames do not depend on how batches are cut.
            if wm >= open_until.saturating_sub(1) {
                let target = trials
                    .peek()
                    .map(|t| t.onset.saturating_sub(1))
                    .unwrap_or(end)
                    .min(end);
                if target > next {
                    let cap = self
                        .spikes
                        .get(si + GAP_BATCH_SPIKES)
                        .map(|s| s.0 - 1)
                        .unwrap_or(i64::MAX);
                    next = target.min(cap.max(next));
                }
            }
            while let Some(t) = trials.peek() {
                if t.onset <= next {
                    out.push(Event::Open {
                        trial: t.id,
                        onset: t.onset,
                        stimulus: t.stimulus.clone(),
                    });
                    open_until = open_until.max(t.onset.saturating_add(window_ticks));
                    trials.next();
                } else {
                    break;
                }
            }
            let from = si;
            while si < self.spikes.len() && self.spikes.tick(si) <= next {
                si += 1;
            }
            out.push(Event::Batch {
                spikes: self.spikes.range(from..si).collect(),
                watermark: next,
            });
            wm = next;
        }
        out
    }

    /// The same session with only the trials at `keep` (indices into `trials`; spikes kept).
    pub fn subset(&self, keep: &[usize]) -> Dataset {
        Dataset {
            tick_rate_hz: self.tick_rate_hz,
            units: self.units.clone(),
            spikes: self.spikes.clone(),
            trials: keep.iter().map(|&i| self.trials[i].clone()).collect(),
            declared_from: self.declared_from.clone(),
            stimulus_order: self.stimulus_order.clone(),
        }
    }

    /// Spikes that fall in no trial window.
    pub fn spikes_outside_windows(&self, window_ticks: i64) -> usize {
        // Trials are sorted by onset; sweep with the latest window end seen.
        let mut n = 0;
        let mut ti = 0;
        let mut covered_until = i64::MIN; // exclusive end of the union of windows started so far
        let mut onsets: Vec<i64> = self.trials.iter().map(|t| t.onset).collect();
        onsets.sort_unstable();
        for (tick, _) in self.spikes.iter() {
            while ti < onsets.len() && onsets[ti] <= tick {
                covered_until = covered_until.max(onsets[ti].saturating_add(window_ticks));
                ti += 1;
            }
            if tick >= covered_until {
                n += 1;
            }
        }
        n
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bin_rule_is_half_open() {
        assert_eq!(bin_of(100, 100, 10, 5), Some(0));
        assert_eq!(bin_of(109, 100, 10, 5), Some(0));
        assert_eq!(bin_of(110, 100, 10, 5), Some(1));
        assert_eq!(bin_of(149, 100, 10, 5), Some(4));
        assert_eq!(bin_of(150, 100, 10, 5), None);
        assert_eq!(bin_of(99, 100, 10, 5), None);
    }

    #[test]
    fn stimuli_are_listed_numerically_as_first_met_or_as_asked() {
        let trial = |id: u64, s: &str| Trial {
            id,
            onset: id as i64 * 100,
            stimulus: Some(s.into()),
        };
        let mut d = Dataset {
            trials: vec![
                trial(1, "90"),
                trial(2, "0"),
                trial(3, "180"),
                trial(4, "45.5"),
            ],
            ..Dataset::default()
        };
        assert_eq!(d.stimulus_names(), ["0", "45.5", "90", "180"]);
        d.trials[1].stimulus = Some("left".into());
        assert_eq!(d.stimulus_names(), ["90", "left", "180", "45.5"]);
        d.stimulus_order = vec!["left".into(), "45.5".into()];
        assert_eq!(d.stimulus_names(), ["left", "45.5", "90", "180"]);
    }

    #[test]
    fn outside_window_count() {
        let d = Dataset {
            tick_rate_hz: 1000.0,
            trials: vec![
                Trial {
                    id: 1,
                    onset: 10,
                    stimulus: None,
                },
                Trial {
                    id: 2,
                    onset: 15,
                    stimulus: None,
                },
            ],
            spikes: vec![(5, 1), (10, 1), (24, 1), (25, 1), (40, 1)].into(),
            units: vec![1],
            declared_from: Default::default(),
            stimulus_order: Vec::new(),
        };
        // Windows [10, 20) ∪ [15, 25): 5, 25 and 40 fall outside.
        assert_eq!(d.spikes_outside_windows(10), 3);
    }
}
