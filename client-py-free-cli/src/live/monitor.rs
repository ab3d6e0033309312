//! The live monitor: a state built from the daemon's published messages, drawn with ratatui
//! (posterior bars of the open trial, recent decisions marked right or wrong, a sortable
//! per-unit table with per-stimulus detail, a health line), or printed as plain lines or JSON
//! lines when standard output is not a terminal.

use auspex_engine::data::printable;
use auspex_proto::v1::{self, outbound};
use ratatui::layout::{Constraint, Direction, Layout, Rect};
use ratatui::style::{Color, Modifier, Style};
use ratatui::text::{Line, Span};
use ratatui::widgets::{Block, Borders, Cell, Paragraph, Row, Table};
use ratatui::Frame;
use std::collections::{BTreeMap, VecDeque};

/// How the unit table is ordered.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum UnitSort {
    /// Most information first.
    Info,
    /// Highest accuracy first.
    Accuracy,
    /// By unit id.
    Id,
}

#[derive(Clone, Debug, Default)]
struct UnitState {
    accuracy: f64,
    info_bits: f64,
    /// The daemon's assessment: accuracy interval, information s.e., verdict, settled, latency.
    acc_ci: (f64, f64),
    info_se: f64,
    verdict: String,
    settled: bool,
    latency_ms: f64,
    /// Mean count per stimulus with its interval: (trials, mean, low, high).
    tuning: Vec<(u64, f64, f64, f64)>,
    /// Per presented stimulus: (trials, Σ posterior of the presented stimulus, times decoded right).
    per_stim: Vec<(u64, f64, u64)>,
}

/// One line of the recent-decisions list.
#[derive(Clone, Debug)]
pub struct RecentDecision {
    /// Trial.
    pub trial: u64,
    /// Decided stimulus.
    pub stimulus: String,
    /// Its posterior.
    pub posterior: f64,
    /// Time after onset, ms.
    pub at_ms: f64,
    /// Presented stimulus, when known.
    pub presented: Option<String>,
}

/// Everything the monitor shows.
#[derive(Clone)]
pub struct MonitorState {
    stimuli: Vec<String>,
    bin_ms: f64,
    trial: Option<(u64, u32, Vec<f64>)>,
    trial_decision: Option<(u64, String, f64, f64)>,
    recent: VecDeque<RecentDecision>,
    units: BTreeMap<u32, UnitState>,
    health: Option<v1::Health>,
    /// Unit ordering.
    pub sort: UnitSort,
    /// Frozen display.
    pub paused: bool,
    /// Selected row of the unit table.
    pub selected: usize,
    /// The unit selected (the selection follows it as rows re-sort).
    selected_unit: Option<u32>,
    decided: u64,
    correct: u64,
    /// Messages lost between daemon and monitor (per-topic sequence gaps).
    pub missed: u64,
    /// Parts of the units missing from the latest frame (an engine thread stopped), bit mask.
    pub missing_parts: u64,
    last_seq: [u64; 6],
    /// Summaries of sessions that ended while the monitor ran.
    pub sessions_ended: Vec<String>,
    /// The session tallied has ended: the next trial starts a new tally.
    pub session_over: bool,
    /// The daemon tallied (its `incarnation`; 0 before the first word).
    pub daemon: u64,
    /// The decision policy and what backs it (the daemon's status, re-read every second).
    pub policy: String,
    /// Seconds since the daemon was last heard, once that is longer than a few health periods.
    pub silent_s: Option<f64>,
    /// What a learning daemon without a model yet waits for (its status), else empty.
    waiting_for: String,
}

/// Names as the screen shows them: control characters escaped ([`printable`]), so a name from
/// a file or the wire cannot drive the terminal.
fn shown(names: &[String]) -> Vec<String> {
    names.iter().map(|n| printable(n).into_owned()).collect()
}

impl MonitorState {
    /// A monitor for these stimuli and bin width.
    pub fn new(stimuli: Vec<String>, bin_width_s: f64) -> Self {
        MonitorState {
            stimuli: shown(&stimuli),
            bin_ms: bin_width_s * 1000.0,
            trial: None,
            trial_decision: None,
            recent: VecDeque::new(),
            units: BTreeMap::new(),
            health: None,
            sort: UnitSort::Info,
            paused: false,
            selected: 0,
            selected_unit: None,
            decided: 0,
            correct: 0,
            missed: 0,
            missing_parts: 0,
            last_seq: [0; 6],
            sessions_ended: Vec::new(),
            session_over: false,
            daemon: 0,
            policy: String::new(),
            silent_s: None,
            waiting_for: String::new(),
        }
    }

    fn name(&self, i: u32) -> String {
        self.stimuli
            .get(i as usize)
            .cloned()
            .unwrap_or_else(|| format!("#{i}"))
    }

    /// Starts the tallies afresh (a new daemon or a new session): decisions, units, recent
    /// lines and the missed-message count; the stimuli, policy and view settings stay.
    pub fn new_tally(&mut self) {
        self.session_over = false;
        self.trial = None;
        self.trial_decision = None;
        self.recent.clear();
        self.units.clear();
        self.decided = 0;
        self.correct = 0;
        self.missed = 0;
        self.last_seq = [0; 6];
        self.selected = 0;
        self.selected_unit = None;
    }

    /// Notes the daemon's incarnation; true when it is another daemon than the one tallied
    /// (the tally must start afresh).
    fn meet(&mut self, incarnation: u64) -> bool {
        if incarnation == 0 {
            return false;
        }
        let other = self.daemon != 0 && self.daemon != incarnation;
        self.daemon = incarnation;
        other
    }

    /// Follows the daemon's current settings (its status): the policy line, and the stimuli
    /// when a reload or a learned model changed them. True when the status is another
    /// daemon's than the one tallied: the tally starts afresh.
    pub fn follow_status(&mut self, st: &v1::Status) -> bool {
        let other = st.health.as_ref().is_some_and(|h| self.meet(h.incarnation));
        if other {
            self.new_tally();
            self.health = None;
        }
        self.policy = policy_line(st);
        self.waiting_for = match &st.learning {
            Some(l) if st.stimuli.is_empty() => {
                format!(
                    "no model yet: {} labelled trials taken{}",
                    l.trials_learned,
                    if l.waiting_for.is_empty() {
                        String::new()
                    } else {
                        format!(" — not yet: {}", printable(&l.waiting_for))
                    }
                )
            }
            _ => String::new(),
        };
        let names = shown(&st.stimuli);
        if !names.is_empty() && names != self.stimuli {
            self.stimuli = names;
        }
        other
    }

    /// Applies one published message.
    pub fn apply(&mut self, topic: &str, m: &v1::Outbound) {
        if let Some(i) = auspex_proto::topic::ALL.iter().position(|t| *t == topic) {
            if self.last_seq[i] != 0 && m.seq > self.last_seq[i] + 1 {
                self.missed += m.seq - self.last_seq[i] - 1;
            }
            self.last_seq[i] = m.seq;
        }
        let of_a_trial = matches!(
            m.body,
            Some(
                outbound::Body::Posterior(_)
                    | outbound::Body::Decision(_)
                    | outbound::Body::Trial(_)
                    | outbound::Body::Units(_)
            )
        );
        if of_a_trial && self.session_over {
            // The first trial of the next session: its tally starts afresh (the daemon's
            // promise watch starts over at the session's start too).
            let seq = self.last_seq;
            self.new_tally();
            self.last_seq = seq;
        }
        match &m.body {
            Some(outbound::Body::Posterior(p)) => {
                if self.trial.as_ref().map(|t| t.0) != Some(p.trial) {
                    self.trial_decision = None;
                }
                self.trial = Some((p.trial, p.bin, p.posterior.clone()));
                self.missing_parts = p.missing_parts;
            }
            Some(outbound::Body::Decision(d)) => {
                let at_ms = (d.bin as f64 + 1.0) * self.bin_ms;
                if self.trial.as_ref().is_none_or(|t| t.0 == d.trial) {
                    self.trial_decision = Some((
                        d.trial,
                        printable(&d.stimulus_name).into_owned(),
                        d.posterior,
                        at_ms,
                    ));
                }
                self.recent.push_front(RecentDecision {
                    trial: d.trial,
                    stimulus: printable(&d.stimulus_name).into_owned(),
                    posterior: d.posterior,
                    at_ms,
                    presented: (!d.presented.is_empty())
                        .then(|| printable(&d.presented).into_owned()),
                });
                self.recent.truncate(200);
                if !d.presented.is_empty() {
                    self.decided += 1;
                    self.correct += (d.presented == d.stimulus_name) as u64;
                }
            }
            Some(outbound::Body::Session(s)) => {
                // The ended session's tally stays in view (beside the daemon's record of it,
                // which lasts until the next session starts); the next session's first trial
                // starts a new one.
                self.sessions_ended.push(session_line(s));
                self.session_over = true;
            }
            Some(outbound::Body::Trial(t)) => {
                // A learned model may add stimuli as the session goes: follow the trial's.
                let names = shown(&t.stimuli);
                if !names.is_empty() && names != self.stimuli {
                    self.stimuli = names;
                }
                if !t.presented.is_empty() {
                    if let Some(r) = self.recent.iter_mut().find(|r| r.trial == t.trial) {
                        if r.presented.is_none() {
                            r.presented = Some(printable(&t.presented).into_owned());
                            self.decided += 1;
                            self.correct += (t.presented == r.stimulus) as u64;
                        }
                    }
                }
            }
            Some(outbound::Body::Units(u)) => {
                let p = self.stimuli.iter().position(|s| *s == u.presented);
                let ns = self.stimuli.len();
                for l in &u.units {
                    let st = self.units.entry(l.unit).or_default();
                    st.accuracy = l.accuracy;
                    st.info_bits = l.info_bits;
                    st.acc_ci = (l.accuracy_low, l.accuracy_high);
                    st.info_se = l.info_se_bits;
                    st.verdict = l.verdict.clone();
                    st.settled = l.settled;
                    st.latency_ms = l.latency_ms;
                    st.tuning = l
                        .tuning
                        .iter()
                        .map(|t| (t.trials, t.mean_count, t.low, t.high))
                        .collect();
                    if st.per_stim.len() != ns {
                        st.per_stim = vec![(0, 0.0, 0); ns];
                    }
                    if let Some(p) = p {
                        let e = &mut st.per_stim[p];
                        e.0 += 1;
                        e.1 += l.presented_posterior;
                        e.2 += (l.decoded as usize == p) as u64;
                    }
                }
            }
            Some(outbound::Body::Health(h)) => {
                // Another daemon (restarted on the same endpoints): its decisions start a
                // tally of their own. Daemons from before `incarnation` existed send 0: for
                // them, an uptime that went back tells.
                let other = self.meet(h.incarnation)
                    || (h.incarnation == 0
                        && self
                            .health
                            .as_ref()
                            .is_some_and(|prev| h.uptime_s + 0.5 < prev.uptime_s));
                if other {
                    self.new_tally();
                    if let Some(i) = auspex_proto::topic::ALL.iter().position(|t| *t == topic) {
                        self.last_seq[i] = m.seq;
                    }
                }
                self.health = Some(h.clone())
            }
            None => {}
        }
    }

    /// Units in display order: (id, accuracy, info).
    pub fn unit_rows(&self) -> Vec<(u32, f64, f64)> {
        let mut v: Vec<(u32, f64, f64)> = self
            .units
            .iter()
            .map(|(k, s)| (*k, s.accuracy, s.info_bits))
            .collect();
        match self.sort {
            UnitSort::Info => v.sort_by(|a, b| b.2.total_cmp(&a.2).then(a.0.cmp(&b.0))),
            UnitSort::Accuracy => v.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0))),
            UnitSort::Id => {}
        }
        v
    }

    /// Cycles the unit ordering.
    pub fn next_sort(&mut self) {
        self.sort = match self.sort {
            UnitSort::Info => UnitSort::Accuracy,
            UnitSort::Accuracy => UnitSort::Id,
            UnitSort::Id => UnitSort::Info,
        };
    }

    /// Moves the unit selection.
    pub fn select(&mut self, delta: i64) {
        let rows = self.unit_rows();
        let n = rows.len() as i64;
        if n > 0 {
            let here = self.selected_row(&rows) as i64;
            self.selected = (here + delta).rem_euclid(n) as usize;
            self.selected_unit = Some(rows[self.selected].0);
        }
    }

    /// The row of the selected unit in `rows` (the selection follows the unit, not the row).
    fn selected_row(&self, rows: &[(u32, f64, f64)]) -> usize {
        self.selected_unit
            .and_then(|u| rows.iter().position(|r| r.0 == u))
            .unwrap_or(self.selected.min(rows.len().saturating_sub(1)))
    }

    /// The health line text.
    pub fn health_line(&self) -> String {
        match &self.health {
            None => "health: waiting for the daemon's first report".into(),
            Some(h) => format!(
                "spikes {:.0}/s  frames {:.0}/s  late {}  unknown-unit {}  malformed {}  gaps {}  dropped {}  backlog {}  update p50 {:.0} µs p99 {:.0} µs",
                h.spikes_per_s,
                h.frames_per_s,
                h.late_spikes,
                h.unknown_unit_spikes,
                h.malformed_messages,
                h.sequence_gaps,
                h.dropped_posterior + h.dropped_other,
                h.engine_backlog,
                h.update_p50_us,
                h.update_p99_us
            ),
        }
    }

    /// Draws the whole screen.
    pub fn draw(&self, f: &mut Frame) {
        let area = f.area();
        let rows = Layout::default()
            .direction(Direction::Vertical)
            .constraints([
                Constraint::Length(1),
                Constraint::Min(8),
                Constraint::Min(8),
                Constraint::Length(3),
            ])
            .split(area);
        let acc = if self.decided > 0 {
            format!(
                "{:.0}% right of {}",
                100.0 * self.correct as f64 / self.decided as f64,
                self.decided
            )
        } else {
            "no labelled decisions yet".into()
        };
        let title = Line::from(vec![
            Span::styled(
                " AUSPEX ",
                Style::default()
                    .fg(Color::Black)
                    .bg(Color::Yellow)
                    .add_modifier(Modifier::BOLD),
            ),
            Span::styled(
                match self.silent_s {
                    Some(s) => format!(" NO WORD FROM THE DAEMON FOR {s:.0} s "),
                    None => String::new(),
                },
                Style::default()
                    .fg(Color::White)
                    .bg(Color::Red)
                    .add_modifier(Modifier::BOLD),
            ),
            Span::styled(
                if self.paused { "   ‖ PAUSED" } else { "" },
                Style::default().fg(Color::Red),
            ),
            Span::raw(format!("  decisions: {acc}")),
            match &self.health {
                Some(h) if !h.promises.is_empty() => {
                    // One figure per promised level: levels are never merged into one count.
                    let levels: Vec<String> = h
                        .promises
                        .iter()
                        .map(|r| {
                            format!(
                                "{} {} {}/{}",
                                r.promise,
                                if r.broken { "BROKEN" } else { "kept" },
                                r.correct,
                                r.decisions
                            )
                        })
                        .collect();
                    if h.promise_broken {
                        Span::styled(
                            format!("   PROMISE {}", levels.join(" · ")),
                            Style::default()
                                .fg(Color::White)
                                .bg(Color::Red)
                                .add_modifier(Modifier::BOLD),
                        )
                    } else {
                        Span::styled(
                            format!("   promise {}", levels.join(" · ")),
                            Style::default().fg(Color::Green),
                        )
                    }
                }
                _ => Span::raw(""),
            },
            Span::styled(
                match &self.health {
                    Some(h) if h.learning => format!(
                        "   learning{}: {} labelled trials, {}",
                        if h.learning_frozen { " (frozen)" } else { "" },
                        h.trials_learned,
                        if h.learned_model_trials > 0 {
                            format!("model from {}", h.learned_model_trials)
                        } else {
                            "no model yet".into()
                        }
                    ),
                    _ => String::new(),
                },
                Style::default().fg(Color::Cyan),
            ),
            Span::raw(if self.missed > 0 {
                format!("   {} messages missed", self.missed)
            } else {
                String::new()
            }),
        ]);
        f.render_widget(
            Paragraph::new(fit_line(title.spans, rows[0].width as usize)),
            rows[0],
        );
        let top = Layout::default()
            .direction(Direction::Horizontal)
            .constraints([Constraint::Percentage(55), Constraint::Percentage(45)])
            .split(rows[1]);
        self.draw_posterior(f, top[0]);
        self.draw_recent(f, top[1]);
        let bottom = Layout::default()
            .direction(Direction::Horizontal)
            .constraints([Constraint::Percentage(55), Constraint::Percentage(45)])
            .split(rows[2]);
        self.draw_units(f, bottom[0]);
        self.draw_unit_detail(f, bottom[1]);
        // Each footer line in whole parts: a narrow screen drops the last ones.
        let w = rows[3].width as usize;
        let parts = |text: String, sep: &str, style: Style| -> Line<'static> {
            // Each part after the first carries its separator in front: a part left out takes
            // its separator with it (no line ends in a dangling " ·").
            fit_line(
                text.split(sep)
                    .enumerate()
                    .map(|(i, p)| {
                        Span::styled(
                            if i > 0 {
                                format!("{sep}{p}")
                            } else {
                                p.to_string()
                            },
                            style,
                        )
                    })
                    .collect(),
                w,
            )
        };
        let foot = vec![
            parts(self.policy.clone(), " · ", Style::default().fg(Color::Cyan)),
            parts(self.health_line(), "  ", Style::default().fg(Color::Gray)),
            parts(
                "q quit · p pause · o order units · ↑/↓ select unit".into(),
                " · ",
                Style::default().fg(Color::DarkGray),
            ),
        ];
        f.render_widget(Paragraph::new(foot), rows[3]);
    }

    fn draw_posterior(&self, f: &mut Frame, area: Rect) {
        let (title, lines) = match &self.trial {
            None => (
                "posterior".to_string(),
                vec![Line::from(if self.waiting_for.is_empty() {
                    "waiting for a trial…".to_string()
                } else {
                    self.waiting_for.clone()
                })],
            ),
            Some((trial, bin, post)) => {
                let mut t = format!(
                    "trial {trial} · {:.0} ms after onset",
                    (*bin as f64 + 1.0) * self.bin_ms
                );
                if self.missing_parts != 0 {
                    t.push_str(&format!(
                        // Short enough for the panel's title on an 80-column screen.
                        " · WITHOUT units of {} part(s)",
                        self.missing_parts.count_ones()
                    ));
                }
                let width = area.width.saturating_sub(20) as f64;
                let dec = self.trial_decision.as_ref().filter(|d| d.0 == *trial);
                let mut lines: Vec<Line> = post
                    .iter()
                    .enumerate()
                    .map(|(i, p)| {
                        // Values come off the wire: a bar never exceeds the panel, whatever they say.
                        let n = (p.clamp(0.0, 1.0) * width).round() as usize;
                        let chosen = dec.is_some_and(|d| d.1 == self.name(i as u32));
                        let color = if chosen { Color::Green } else { Color::Cyan };
                        Line::from(vec![
                            Span::raw(format!("{:>6} ", self.name(i as u32))),
                            Span::styled("█".repeat(n), Style::default().fg(color)),
                            Span::raw(format!(" {:.2}", p)),
                        ])
                    })
                    .collect();
                if let Some(d) = dec {
                    lines.push(Line::from(Span::styled(
                        format!("decided {} (p = {:.2}) at {:.0} ms", d.1, d.2, d.3),
                        Style::default()
                            .fg(Color::Green)
                            .add_modifier(Modifier::BOLD),
                    )));
                }
                (t, lines)
            }
        };
        let mut lines = lines;
        if self.session_over {
            lines.insert(
                0,
                fit_line(
                    vec![
                        Span::styled(
                            "session ended",
                            Style::default()
                                .fg(Color::Yellow)
                                .add_modifier(Modifier::BOLD),
                        ),
                        Span::raw(" · its tally stays until the next trial"),
                    ],
                    area.width.saturating_sub(2) as usize,
                ),
            );
        }
        f.render_widget(
            Paragraph::new(lines).block(
                Block::default().borders(Borders::ALL).title(fit_title(
                    &[
                        title.clone(),
                        title
                            .split(" · WITHOUT")
                            .next()
                            .unwrap_or_default()
                            .to_string(),
                        title.split(" · ").next().unwrap_or_default().to_string(),
                    ],
                    area.width,
                )),
            ),
            area,
        );
    }

    fn draw_recent(&self, f: &mut Frame, area: Rect) {
        let lines: Vec<Line> = self
            .recent
            .iter()
            .take(area.height.saturating_sub(2) as usize)
            .map(|r| {
                let (mark, color) = match &r.presented {
                    Some(p) if *p == r.stimulus => ("✓".to_string(), Color::Green),
                    Some(p) => (format!("✗ was {p}"), Color::Red),
                    None => ("·".to_string(), Color::Gray),
                };
                let width = area.width.saturating_sub(2) as usize;
                let head = format!(
                    "#{:<5} {:>6} {:.2} {:>4.0} ms ",
                    r.trial, r.stimulus, r.posterior, r.at_ms
                );
                // A narrow panel drops "was NE" whole (✗ alone), never cuts the name.
                let mark = if head.chars().count() + mark.chars().count() > width {
                    mark.chars().take(1).collect()
                } else {
                    mark
                };
                fit_line(
                    vec![
                        Span::raw(head),
                        Span::styled(mark, Style::default().fg(color)),
                    ],
                    width,
                )
            })
            .collect();
        f.render_widget(
            Paragraph::new(lines).block(
                Block::default()
                    .borders(Borders::ALL)
                    .title("recent decisions"),
            ),
            area,
        );
    }

    fn draw_units(&self, f: &mut Frame, area: Rect) {
        let rows_v = self.unit_rows();
        let sel = self.selected_row(&rows_v);
        let max_info = rows_v.iter().map(|r| r.2).fold(1e-9, f64::max);
        // Columns by priority (unit, bits, accuracy, verdict, bar), as many as fit whole: a
        // narrow panel drops a column, never cuts a number.
        let widths = [7u16, 14, 10, 10, 12];
        let inner = area.width.saturating_sub(2);
        let mut cols: Vec<usize> = Vec::new();
        let mut used = 0u16;
        for c in [0usize, 2, 1, 4, 3] {
            let need = widths[c] + if cols.is_empty() { 0 } else { 1 };
            if used + need <= inner {
                cols.push(c);
                used += need;
            }
        }
        cols.sort_unstable();
        let rows: Vec<Row> = rows_v
            .iter()
            .enumerate()
            .map(|(i, (u, a, info))| {
                let bar = "▮".repeat(((info / max_info) * 10.0).round() as usize);
                let style = if i == sel {
                    Style::default().add_modifier(Modifier::REVERSED)
                } else {
                    Style::default()
                };
                let st = &self.units[u];
                let verdict = if st.verdict.is_empty() {
                    String::new()
                } else if st.settled {
                    format!("{}, settled", st.verdict)
                } else {
                    st.verdict.clone()
                };
                let vstyle = match st.verdict.as_str() {
                    "encodes" => Style::default().fg(Color::Cyan),
                    "not yet enough trials" => Style::default().fg(Color::DarkGray),
                    _ => Style::default(),
                };
                let cells = vec![
                    Cell::from(u.to_string()),
                    Cell::from(format!(
                        "{:.0}% [{:.0}–{:.0}]",
                        a * 100.0,
                        st.acc_ci.0 * 100.0,
                        st.acc_ci.1 * 100.0
                    )),
                    Cell::from(format!("{info:.2}±{:.2}", st.info_se)),
                    Cell::from(bar),
                    Cell::from(verdict).style(vstyle),
                ];
                Row::new(
                    cells
                        .into_iter()
                        .enumerate()
                        .filter(|(c, _)| cols.contains(c))
                        .map(|(_, x)| x),
                )
                .style(style)
            })
            .collect();
        let sort = match self.sort {
            UnitSort::Info => "information",
            UnitSort::Accuracy => "accuracy",
            UnitSort::Id => "unit id",
        };
        let heads = ["unit", "acc [95%]", "bits ± se", "", "verdict"];
        let t = Table::new(
            rows,
            cols.iter()
                .map(|&c| {
                    if c == 4 {
                        Constraint::Min(widths[c])
                    } else {
                        Constraint::Length(widths[c])
                    }
                })
                .collect::<Vec<_>>(),
        )
        .header(
            Row::new(cols.iter().map(|&c| heads[c]).collect::<Vec<_>>())
                .style(Style::default().add_modifier(Modifier::BOLD)),
        )
        .block(Block::default().borders(Borders::ALL).title(fit_title(
            &[
                format!("units by {sort} (single-unit, end of window)"),
                format!("units by {sort}"),
                "units".into(),
            ],
            area.width,
        )));
        f.render_widget(t, area);
    }

    fn draw_unit_detail(&self, f: &mut Frame, area: Rect) {
        let rows_v = self.unit_rows();
        let Some((unit, _, _)) = rows_v.get(self.selected_row(&rows_v)) else {
            f.render_widget(
                Paragraph::new("no per-unit reports yet")
                    .block(Block::default().borders(Borders::ALL).title("unit detail")),
                area,
            );
            return;
        };
        let st = &self.units[unit];
        let max_mean = st.tuning.iter().map(|t| t.3).fold(1e-9, f64::max);
        let mut lines: Vec<Line> = st
            .per_stim
            .iter()
            .enumerate()
            .map(|(i, (n, sp, right))| {
                let tune = st.tuning.get(i).copied().unwrap_or_default();
                let count = if tune.0 > 0 {
                    format!("count {:.2} [{:.2}–{:.2}]", tune.1, tune.2, tune.3)
                } else {
                    "count –".into()
                };
                let count = format!("{count:<25}");
                let bar = "█".repeat(((tune.1 / max_mean) * 10.0).round() as usize);
                let width = area.width.saturating_sub(2) as usize;
                if *n == 0 {
                    fit_line(
                        vec![Span::raw(format!("{:>6} {count}", self.name(i as u32)))],
                        width,
                    )
                } else {
                    let mean = sp / *n as f64;
                    fit_line(
                        vec![
                            Span::raw(format!("{:>6} {count}", self.name(i as u32))),
                            Span::raw(format!(" right {right}/{n}")),
                            Span::raw(format!(" p̄={mean:.2}")),
                            Span::styled(
                                format!(" {bar:<10}"),
                                Style::default().fg(Color::Magenta),
                            ),
                        ],
                        width,
                    )
                }
            })
            .collect();
        if st.latency_ms > 0.0 {
            lines.push(fit_line(
                vec![
                    Span::raw(format!("peak response {:.0} ms after onset", st.latency_ms)),
                    Span::raw(" (preferred stimulus)"),
                ],
                area.width.saturating_sub(2) as usize,
            ));
        }
        f.render_widget(
            Paragraph::new(lines).block(Block::default().borders(Borders::ALL).title(fit_title(
                &[
                    format!("unit {unit}: tuning and presented posterior"),
                    format!("unit {unit}: tuning"),
                    format!("unit {unit}"),
                ],
                area.width,
            ))),
            area,
        );
    }
}

/// The first of `titles` (longest first) that fits a panel `width` columns wide.
fn fit_title(titles: &[String], width: u16) -> String {
    let room = width.saturating_sub(2) as usize;
    titles
        .iter()
        .find(|t| Span::raw(t.to_string()).width() <= room)
        .or(titles.last())
        .cloned()
        .unwrap_or_default()
}

/// The spans that fit in `width` columns, whole: a span that does not fit is left out (the
/// spans after it are tried in turn), so a narrow screen drops a figure, never cuts one.
pub fn fit_line(spans: Vec<Span<'static>>, width: usize) -> Line<'static> {
    let w = |t: &str| Span::raw(t.to_string()).width();
    let mut used = 0usize;
    let mut kept = Vec::new();
    for sp in spans {
        let n = sp.width();
        if n == 0 {
            continue;
        }
        if used + n <= width {
            used += n;
            kept.push(sp);
        } else if kept.is_empty() {
            // Not even the first part fits: cut it at a word boundary rather than mid-figure.
            let mut t = String::new();
            for word in sp.content.split_inclusive(' ') {
                if w(format!("{t}{word}").trim_end()) > width {
                    break;
                }
                t.push_str(word);
            }
            used += w(&t);
            kept.push(Span::styled(t, sp.style));
        }
    }
    Line::from(kept)
}

/// One line for the live record of one promised level.
pub fn promise_record_line(r: &v1::PromiseRecord) -> String {
    format!(
        "promise {}{}: {}/{} labelled threshold decisions right = {:.3} (95% interval {:.3}–{:.3}){}",
        r.promise,
        if r.threshold != r.promise {
            format!(" (threshold {})", r.threshold)
        } else {
            String::new()
        },
        r.correct,
        r.decisions,
        r.correct as f64 / r.decisions.max(1) as f64,
        r.accuracy_lo,
        r.accuracy_hi,
        if r.broken {
            " — BROKEN: right less often than promised (CUSUM alarm)"
        } else {
            " — kept so far"
        }
    )
}

/// One line: the decision policy and what backs it (the monitor's footer).
pub fn policy_line(s: &v1::Status) -> String {
    let mut out = format!(
        "decide at θ {} after {:.0} ms",
        s.threshold,
        s.min_time_s * 1000.0
    );
    let steer = steering_part(s);
    if !steer.is_empty() {
        out += &format!(" · {steer}");
    }
    if s.realtime.starts_with("REFUSED") {
        out += " · real-time REFUSED (see status)";
    } else if s.realtime.starts_with("on") {
        out += " · real-time";
    }
    if let Some(p) = &s.promise {
        out += &format!(
            " · calibration {}{}",
            p.calibration,
            if p.calibrated { "" } else { " (off)" }
        );
        if p.target_accuracy > 0.0 {
            out += &format!(" · target {}", p.target_accuracy);
        }
        if p.withheld {
            out += " · threshold decisions WITHHELD";
        }
        if !p.evidence.is_empty() {
            out += &format!(" · {}", p.evidence);
        }
    }
    out
}

/// The steered policies' state in one short part (empty before their first choice): the
/// monitor's footer and `auspex status` — find-tuning's settled units, or improve-decoding's
/// expected accuracy after its last choice.
pub fn steering_part(s: &v1::Status) -> String {
    let Some(st) = s.steering.as_ref().filter(|st| st.choices > 0) else {
        return String::new();
    };
    let settled = st.units.iter().filter(|u| u.settled >= 0.95).count();
    // The policy of the last choice (a warm-up choice of improve-decoding has no expected
    // accuracy yet, and is still improve-decoding's).
    let mut out = match &st.last {
        Some(l) if l.policy == "improve-decoding" && l.expected_accuracy.is_finite() => format!(
            "improve-decoding ~{:.0}% expected",
            100.0 * l.expected_accuracy
        ),
        Some(l) if !l.policy.is_empty() => {
            format!("{} {settled}/{} tuned", l.policy, st.units.len())
        }
        _ => format!("find-tuning {settled}/{} tuned", st.units.len()),
    };
    if let Some(l) = &st.last {
        out += &format!(", chose {}", printable(&l.stimulus));
        if l.serves_unit {
            out += &format!(" for unit {}", l.unit);
        }
    }
    out
}

/// find-tuning's state for `auspex status`: the set, the constraints, the last choice and its
/// reason, and each unit's preferred stimulus and how settled it is.
pub fn steering_lines(s: &v1::Status) -> Vec<String> {
    let Some(st) = &s.steering else {
        return Vec::new();
    };
    let mut out = vec![format!(
        "steering (find-tuning, improve-decoding): {} stimuli ({}) · {} trials recorded · {} choices · warm-up {} block(s), minimum share {}, at most {} in a row, seed {}{}",
        st.stimuli.len(),
        if st.stimuli_from.is_empty() { "set not known yet" } else { &st.stimuli_from },
        st.trials,
        st.choices,
        st.warmup_blocks,
        st.min_share,
        st.max_run,
        st.seed,
        if st.unknown_stimuli > 0 {
            format!(" · {} trials named a stimulus outside the set", st.unknown_stimuli)
        } else {
            String::new()
        }
    )];
    if let Some(l) = &st.last {
        out.push(format!(
            "  last choice {}: {}",
            printable(&l.stimulus),
            crate::live::steer::next_reason(l).unwrap_or_default()
        ));
    }
    for u in &st.units {
        out.push(format!(
            "  unit {:>5}: prefers {} ±1 ({:.0}%{}) · margin {:.2} SD · {} trials",
            u.unit,
            if u.preferred.is_empty() {
                "?".into()
            } else {
                printable(&u.preferred)
            },
            100.0 * u.settled,
            if u.settled >= 0.95 { ", settled" } else { "" },
            u.margin,
            u.trials
        ));
    }
    out
}

/// A shard's or combiner's place in its deployment, for `auspex status` (nothing for a whole
/// daemon): a shard's part; a combiner's shards, each joined or why not.
pub fn deployment_lines(s: &v1::Status) -> Vec<String> {
    let unsent = s.health.as_ref().map_or(0, |h| h.partials_unsent);
    match s.role.as_str() {
        "shard" => vec![format!(
            "shard: part {} of {} · partials go to the combiner connected to its link{}",
            s.part,
            s.parts,
            if unsent > 0 {
                format!(" · {unsent} partials found no combiner")
            } else {
                String::new()
            }
        )],
        "combine" => {
            let h = s.health.clone().unwrap_or_default();
            let mut out = vec![format!(
                "combiner of {} shards · {}{}{}",
                s.parts,
                match h.shards_lost {
                    0 => "none lost".to_string(),
                    1 => "a shard lost once".to_string(),
                    n => format!("shards lost {n} times"),
                },
                if h.missing_parts != 0 {
                    format!(
                        " · trials opened now LACK parts {}",
                        parts_list(h.missing_parts)
                    )
                } else {
                    String::new()
                },
                if h.misrouted_spikes > 0 {
                    format!(
                        " · {} spikes reached the combiner (send them to their shard)",
                        h.misrouted_spikes
                    )
                } else {
                    String::new()
                }
            )];
            for x in &s.shards {
                out.push(format!(
                    "  part {} {} · {} · {} partials · last heard {:.1} s ago · lost {} time{}{}",
                    x.part,
                    x.endpoint,
                    if x.joined { "joined" } else { "NOT JOINED" },
                    x.partials,
                    x.silent_s,
                    x.times_lost,
                    if x.times_lost == 1 { "" } else { "s" },
                    if x.note.is_empty() {
                        String::new()
                    } else {
                        format!(" · {}", x.note)
                    }
                ));
            }
            out
        }
        _ => Vec::new(),
    }
}

/// Bit mask of parts as "0, 2".
pub fn parts_list(mask: u64) -> String {
    (0..64)
        .filter(|p| mask & (1u64 << p) != 0)
        .map(|p| p.to_string())
        .collect::<Vec<_>>()
        .join(", ")
}

/// What backs the decision threshold, and how the promise has been kept this session (status).
pub fn promise_lines(s: &v1::Status) -> Vec<String> {
    let mut out = Vec::new();
    if let Some(p) = &s.promise {
        let how = if p.target_accuracy > 0.0 {
            format!("target accuracy {}", p.target_accuracy)
        } else {
            format!("threshold {} set directly", s.threshold)
        };
        out.push(format!(
            "promise: {how} · calibration {}{}",
            p.calibration,
            if p.calibrated { "" } else { " (switched off)" }
        ));
        if p.withheld {
            out.push(format!(
                "  threshold decisions WITHHELD (every decision at the window end): {}",
                p.evidence
            ));
        } else if !p.evidence.is_empty() {
            out.push(format!("  {}", p.evidence));
        }
    }
    if let Some(h) = &s.health {
        for r in &h.promises {
            out.push(format!("  {}", promise_record_line(r)));
        }
    }
    out
}

/// One line for a session summary (plain mode, status).
pub fn session_line(s: &v1::SessionSummary) -> String {
    let acc = if s.decisions_labelled > 0 {
        format!(
            "{:.1}% right of {} labelled",
            100.0 * s.decisions_correct as f64 / s.decisions_labelled as f64,
            s.decisions_labelled
        )
    } else {
        "no labelled decisions".into()
    };
    format!(
        "session-end {:?} ({}): {} trials completed, {} cancelled, {} decisions, {acc}, {} trials learned, {:.0} s{}",
        s.session_name,
        s.reason,
        s.trials_completed,
        s.trials_cancelled,
        s.decisions,
        s.trials_learned,
        s.duration_s,
        if s.recording_path.is_empty() {
            String::new()
        } else {
            format!(", recorded in {}", s.recording_path)
        }
    )
}

/// A plain text line for a message, or None for messages plain mode does not print.
pub fn plain_line(state: &MonitorState, topic: &str, m: &v1::Outbound) -> Option<String> {
    match &m.body {
        Some(outbound::Body::Decision(d)) => {
            let mark = if d.presented.is_empty() {
                String::new()
            } else if d.presented == d.stimulus_name {
                " right".into()
            } else {
                format!(" wrong (was {})", printable(&d.presented))
            };
            let reason = if d.reason == v1::DecisionReason::Threshold as i32 {
                "threshold"
            } else {
                "window-end"
            };
            Some(format!(
                "decision trial={} stimulus={} posterior={:.3} at_ms={:.0} reason={reason}{mark}",
                d.trial,
                printable(&d.stimulus_name),
                d.posterior,
                (d.bin as f64 + 1.0) * state.bin_ms
            ))
        }
        Some(outbound::Body::Trial(t)) => Some(format!(
            "trial-end trial={} spikes={} bins={} presented={}",
            t.trial,
            t.spikes,
            t.bins,
            if t.presented.is_empty() {
                "?".into()
            } else {
                printable(&t.presented)
            }
        )),
        Some(outbound::Body::Health(_)) if topic == auspex_proto::topic::HEALTH => {
            Some(format!("health {}", state.health_line()))
        }
        Some(outbound::Body::Session(s)) => Some(session_line(s)),
        _ => None,
    }
}

/// A JSON object for a message (one line in JSON-lines mode).
pub fn json_line(topic: &str, m: &v1::Outbound) -> String {
    use serde_json::json;
    let body = match &m.body {
        Some(outbound::Body::Posterior(p)) => {
            json!({"trial": p.trial, "bin": p.bin, "bin_end_tick": p.bin_end_tick, "posterior": p.posterior, "top": p.top, "top_posterior": p.top_posterior, "entropy_bits": p.entropy_bits, "spikes": p.spikes})
        }
        Some(outbound::Body::Decision(d)) => {
            json!({"trial": d.trial, "stimulus": d.stimulus_name, "posterior": d.posterior, "bin": d.bin, "reason": d.reason, "presented": d.presented})
        }
        Some(outbound::Body::Trial(t)) => {
            json!({"trial": t.trial, "outcome": t.outcome, "spikes": t.spikes, "bins": t.bins, "presented": t.presented})
        }
        Some(outbound::Body::Units(u)) => {
            json!({"trial": u.trial, "presented": u.presented, "labelled_trials": u.labelled_trials,
            "units": u.units.iter().map(|l| json!({"unit": l.unit, "presented_posterior": l.presented_posterior, "decoded": l.decoded, "accuracy": l.accuracy, "accuracy_low": l.accuracy_low, "accuracy_high": l.accuracy_high, "info_bits": l.info_bits, "info_se_bits": l.info_se_bits, "p_value": l.p_value, "verdict": l.verdict, "settled": l.settled, "latency_ms": l.latency_ms, "trials": l.trials,
                "tuning": l.tuning.iter().map(|t| json!({"trials": t.trials, "mean_count": t.mean_count, "low": t.low, "high": t.high})).collect::<Vec<_>>()})).collect::<Vec<_>>()})
        }
        Some(outbound::Body::Health(h)) => {
            json!({"spikes_per_s": h.spikes_per_s, "frames_per_s": h.frames_per_s, "late_spikes": h.late_spikes, "malformed": h.malformed_messages, "sequence_gaps": h.sequence_gaps, "dropped_posterior": h.dropped_posterior, "update_p50_us": h.update_p50_us, "update_p99_us": h.update_p99_us})
        }
        Some(outbound::Body::Session(s)) => {
            json!({"session": s.session_name, "reason": s.reason, "trials_completed": s.trials_completed, "trials_cancelled": s.trials_cancelled, "decisions": s.decisions, "decisions_labelled": s.decisions_labelled, "decisions_correct": s.decisions_correct, "trials_learned": s.trials_learned, "recording": s.recording_path, "duration_s": s.duration_s})
        }
        None => json!(null),
    };
    json!({"topic": topic, "seq": m.seq, "body": body}).to_string()
}

/// The screen `state` draws on a terminal of `w` × `h` cells, as text (one line per row).
pub fn render_at(state: &MonitorState, w: u16, h: u16) -> String {
    let mut term = ratatui::Terminal::new(ratatui::backend::TestBackend::new(w, h))
        .expect("a test backend always opens");
    let _ = term.draw(|f| state.draw(f));
    let buf = term.backend().buffer().clone();
    let mut s = String::new();
    for y in 0..buf.area.height {
        for x in 0..buf.area.width {
            s.push_str(buf[(x, y)].symbol());
        }
        s.push('\n');
    }
    s
}

/// The words and figures on a rendered screen (borders and bars left out): a narrow screen's
/// must all appear, as they are, on a wide screen of the same state — nothing cut.
pub fn screen_words(screen: &str) -> std::collections::BTreeSet<String> {
    screen
        .replace(|c: char| "─│┌┐└┘├┤┬┴┼".contains(c), " ")
        .split_whitespace()
        .filter(|t| !t.chars().all(|c| "█▮".contains(c)))
        .map(str::to_string)
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The footer names the policy of the last choice: improve-decoding's warm-up (no expected
    /// accuracy yet) once read "find-tuning 4/4 tuned" (seen at 80 × 24 during a session that
    /// only asked improve-decoding).
    #[test]
    fn the_steering_footer_names_the_last_choices_policy() {
        let status = |policy: &str, accuracy: f64| v1::Status {
            steering: Some(v1::SteeringState {
                units: vec![
                    v1::UnitTuningState {
                        settled: 0.99,
                        ..Default::default()
                    },
                    v1::UnitTuningState::default(),
                ],
                last: Some(v1::NextStimulusReply {
                    stimulus: "180".into(),
                    policy: policy.into(),
                    expected_accuracy: accuracy,
                    ..Default::default()
                }),
                choices: 3,
                ..Default::default()
            }),
            ..Default::default()
        };
        assert_eq!(
            steering_part(&status("improve-decoding", f64::NAN)),
            "improve-decoding 1/2 tuned, chose 180"
        );
        assert_eq!(
            steering_part(&status("improve-decoding", 0.842)),
            "improve-decoding ~84% expected, chose 180"
        );
        assert_eq!(
            steering_part(&status("find-tuning", f64::NAN)),
            "find-tuning 1/2 tuned, chose 180"
        );
    }

    fn stream() -> Vec<(&'static str, v1::Outbound)> {
        let mut v = Vec::new();
        let mut seq = 0;
        let mut add = |t: &'static str, b: outbound::Body| {
            seq += 1;
            v.push((t, v1::Outbound { seq, body: Some(b) }));
        };
        for bin in 0..30 {
            let a = 0.5 + bin as f64 / 60.0;
            add(
                "posterior",
                outbound::Body::Posterior(v1::PosteriorFrame {
                    trial: 7,
                    bin,
                    posterior: vec![a, 1.0 - a],
                    top: 0,
                    top_posterior: a,
                    ..Default::default()
                }),
            );
        }
        add(
            "decision",
            outbound::Body::Decision(v1::DecisionEvent {
                trial: 7,
                stimulus: 0,
                stimulus_name: "N".into(),
                posterior: 0.98,
                bin: 29,
                reason: 1,
                presented: "N".into(),
                bin_end_tick: 0,
            }),
        );
        add(
            "decision",
            outbound::Body::Decision(v1::DecisionEvent {
                trial: 6,
                stimulus: 1,
                stimulus_name: "S".into(),
                posterior: 0.91,
                bin: 40,
                reason: 1,
                presented: "N".into(),
                bin_end_tick: 0,
            }),
        );
        add(
            "units",
            outbound::Body::Units(v1::UnitReport {
                trial: 7,
                presented: "N".into(),
                labelled_trials: 5,
                units: vec![
                    v1::UnitLine {
                        unit: 101,
                        presented_posterior: 0.9,
                        decoded: 0,
                        accuracy: 0.8,
                        info_bits: 0.5,
                        verdict: "encodes".into(),
                        latency_ms: 42.0,
                        ..Default::default()
                    },
                    v1::UnitLine {
                        unit: 102,
                        presented_posterior: 0.4,
                        decoded: 1,
                        accuracy: 0.4,
                        info_bits: 0.05,
                        ..Default::default()
                    },
                ],
            }),
        );
        add(
            "health",
            outbound::Body::Health(v1::Health {
                spikes_per_s: 320.0,
                frames_per_s: 1000.0,
                update_p50_us: 12.0,
                update_p99_us: 40.0,
                ..Default::default()
            }),
        );
        v
    }

    fn render(state: &MonitorState) -> String {
        render_at(state, 110, 30)
    }

    #[test]
    fn renders_posterior_decisions_units_and_health() {
        let mut st = MonitorState::new(vec!["N".into(), "S".into()], 0.001);
        for (t, m) in stream() {
            st.apply(t, &m);
        }
        let screen = render(&st);
        assert!(screen.contains("trial 7 · 30 ms after onset"), "{screen}");
        assert!(screen.contains("decided N (p = 0.98) at 30 ms"), "{screen}");
        assert!(screen.contains("N 0.98   30 ms ✓"), "{screen}");
        assert!(screen.contains("✗ was N"), "{screen}");
        assert!(screen.contains("units by information"), "{screen}");
        assert!(screen.contains("spikes 320/s"), "{screen}");
        assert!(screen.contains("decisions: 50% right of 2"), "{screen}");
        // Best unit first, selected, with its per-stimulus detail.
        let i101 = screen.find("101").unwrap();
        let i102 = screen.find("102").unwrap();
        assert!(i101 < i102);
        assert!(
            screen.contains("unit 101: tuning and presented posterior"),
            "{screen}"
        );
        st.next_sort();
        st.next_sort();
        assert_eq!(st.unit_rows()[0].0, 101);
        st.select(1);
        assert!(render(&st).contains("unit 102: tuning"));
    }

    /// A frame without some units says so in the posterior panel's title.
    #[test]
    fn a_frame_missing_units_says_so() {
        let mut st = MonitorState::new(vec!["N".into(), "S".into()], 0.001);
        let frame = |missing_parts| v1::Outbound {
            seq: 1,
            body: Some(outbound::Body::Posterior(v1::PosteriorFrame {
                trial: 3,
                bin: 9,
                posterior: vec![0.7, 0.3],
                missing_parts,
                ..Default::default()
            })),
        };
        st.apply("posterior", &frame(1 << 2));
        let screen = render(&st);
        assert!(
            screen.contains("trial 3 · 10 ms after onset · WITHOUT units of 1 part(s)"),
            "{screen}"
        );
        st.apply("posterior", &frame(0));
        assert!(!render(&st).contains("WITHOUT"));
    }

    /// The selection follows its unit as the rows re-sort; pausing freezes a copy, not the
    /// accounting; a restarted daemon (its uptime went back) starts a new tally.
    #[test]
    fn selection_follows_the_unit_and_a_new_daemon_starts_a_new_tally() {
        let mut st = MonitorState::new(vec!["N".into(), "S".into()], 0.001);
        for (t, m) in stream() {
            st.apply(t, &m);
        }
        st.select(1); // from 101 (best) to 102
        assert!(render(&st).contains("unit 102: tuning"));
        // 102 becomes the most informative: it moves to the first row, still selected.
        let report = v1::Outbound {
            seq: 99,
            body: Some(outbound::Body::Units(v1::UnitReport {
                trial: 8,
                presented: "N".into(),
                labelled_trials: 6,
                units: vec![v1::UnitLine {
                    unit: 102,
                    accuracy: 0.95,
                    info_bits: 0.9,
                    ..Default::default()
                }],
            })),
        };
        st.apply("units", &report);
        assert_eq!(st.unit_rows()[0].0, 102);
        assert!(render(&st).contains("unit 102: tuning"));
        assert_eq!(st.decided, 2);
        let h = |uptime_s| v1::Outbound {
            seq: 100,
            body: Some(outbound::Body::Health(v1::Health {
                uptime_s,
                ..Default::default()
            })),
        };
        st.apply("health", &h(50.0));
        st.apply("health", &h(51.0));
        assert_eq!(st.decided, 2, "the same daemon: the tally goes on");
        st.apply("health", &h(0.5));
        assert_eq!(st.decided, 0, "a new daemon: a new tally");
        assert!(render(&st).contains("no labelled decisions yet"));
        st.silent_s = Some(12.0);
        assert!(render(&st).contains("NO WORD FROM THE DAEMON FOR 12 s"));
    }

    /// Words and figures on screen, borders and bars aside.
    use super::screen_words as tokens;

    /// At 80×24, 120×40 and 160×48 every word and figure on screen is whole: each appears,
    /// as it is, on a 250-column screen of the same state (a narrow panel drops whole columns
    /// and parts, never cuts a number or a name), and a wrong decision names the presented
    /// stimulus whole or not at all.
    #[test]
    fn no_cut_numbers_or_names_at_any_size() {
        let mut st = MonitorState::new(vec!["N".into(), "NE".into(), "S".into()], 0.001);
        for (t, m) in stream() {
            st.apply(t, &m);
        }
        st.apply(
            "decision",
            &v1::Outbound {
                seq: 40,
                body: Some(outbound::Body::Decision(v1::DecisionEvent {
                    trial: 56,
                    stimulus: 0,
                    stimulus_name: "N".into(),
                    posterior: 0.93,
                    bin: 21,
                    reason: 1,
                    presented: "NE".into(),
                    bin_end_tick: 0,
                })),
            },
        );
        st.apply(
            "health",
            &v1::Outbound {
                seq: 41,
                body: Some(outbound::Body::Health(v1::Health {
                    uptime_s: 100.0,
                    learning: true,
                    trials_learned: 213,
                    learned_model_trials: 200,
                    promises: vec![
                        v1::PromiseRecord {
                            promise: 0.9,
                            threshold: 0.9,
                            decisions: 120,
                            correct: 118,
                            ..Default::default()
                        },
                        v1::PromiseRecord {
                            promise: 0.97,
                            threshold: 0.97,
                            decisions: 98,
                            correct: 95,
                            ..Default::default()
                        },
                    ],
                    ..Default::default()
                })),
            },
        );
        st.missed = 1640;
        st.policy = "decide at θ 0.9 after 20 ms · calibration temperature (β 0.883) · held out at θ 0.9: 300/320 right".into();
        let wide = tokens(&render_at(&st, 250, 48));
        for (w, h) in [(80, 24), (120, 40), (160, 48)] {
            let screen = render_at(&st, w, h);
            for t in tokens(&screen) {
                assert!(wide.contains(&t), "{w}×{h}: `{t}` is cut:\n{screen}");
            }
            for l in screen.lines() {
                assert!(
                    !l.trim_end().ends_with('·'),
                    "{w}×{h}: a dangling separator: {l}"
                );
            }
            let line56 = screen.lines().find(|l| l.contains("#56")).unwrap();
            assert!(
                line56.contains("✗ was NE") || !line56.contains("was"),
                "{w}×{h}: {line56}"
            );
        }
    }

    /// Names from a model file or the wire reach the screen with control characters escaped:
    /// a name holding an escape sequence cannot clear or recolour the operator's terminal.
    #[test]
    fn names_with_control_characters_are_shown_escaped() {
        let evil = "\u{1b}[2J\u{1b}[31mN";
        let mut st = MonitorState::new(vec![evil.into(), "S".into()], 0.001);
        for (t, mut m) in stream() {
            if let Some(outbound::Body::Decision(d)) = m.body.as_mut() {
                d.stimulus_name = evil.into();
                d.presented = evil.into();
            }
            if let Some(line) = plain_line(&st, t, &m) {
                assert!(!line.contains('\u{1b}'), "{line:?}");
            }
            st.apply(t, &m);
        }
        let screen = render(&st);
        assert!(!screen.contains('\u{1b}'), "{screen}");
        assert!(screen.contains("\\u{1b}[2J"), "{screen}");
    }

    #[test]
    fn plain_and_json_lines() {
        let st = MonitorState::new(vec!["N".into(), "S".into()], 0.001);
        let s = stream();
        let d = &s[30];
        assert_eq!(
            plain_line(&st, d.0, &d.1).unwrap(),
            "decision trial=7 stimulus=N posterior=0.980 at_ms=30 reason=threshold right"
        );
        let j: serde_json::Value = serde_json::from_str(&json_line(d.0, &d.1)).unwrap();
        assert_eq!(j["topic"], "decision");
        assert_eq!(j["body"]["stimulus"], "N");
    }
}
