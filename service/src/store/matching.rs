//! The outcome-matching rules as a pure state machine: what one prediction id's outcome row becomes when an outcome
//! arrives, when a prediction with that id is written, when its route's maturity passes and when its hold runs
//! out. No database here: every backend reads the id's row, asks these functions, and writes back what they say
//! inside one transaction, so the rules are written once and both backends follow them to the letter.
//!
//! The rules (DEVELOPERS.md, "Prediction store"): one outcome per prediction id, given to every prediction with that
//! id; the same label again is a duplicate and changes nothing; a different label replaces the recorded one (the
//! old row goes to the history) and the running figures retract the old pair; an outcome with no prediction yet is
//! held (pending) and matched when the prediction is written, or marked unmatched once its hold has run out; a
//! prediction with no outcome when its route's maturity passes is settled as a negative, which a later real outcome
//! corrects.

use super::OutcomeStatus;

/// Where an outcome row stands.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum OutcomeState {
    /// Held: no prediction with its id was logged yet.
    Pending,
    /// Given to the predictions with its id.
    Matched,
    /// Its hold ran out before any prediction with its id was logged.
    Unmatched,
}

impl OutcomeState {
    /// The word stored in the database's `state` column.
    pub fn as_str(self) -> &'static str {
        match self {
            OutcomeState::Pending => "pending",
            OutcomeState::Matched => "matched",
            OutcomeState::Unmatched => "unmatched",
        }
    }

    /// The state stored as `word`, or `None` for a word no build wrote.
    pub fn parse(word: &str) -> Option<OutcomeState> {
        match word {
            "pending" => Some(OutcomeState::Pending),
            "matched" => Some(OutcomeState::Matched),
            "unmatched" => Some(OutcomeState::Unmatched),
            _ => None,
        }
    }
}

/// Who set an outcome row's label.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Source {
    /// A client sent it.
    Reported,
    /// The maturity rule settled the prediction as a negative.
    Maturity,
}

impl Source {
    /// The word stored in the database's `source` column.
    pub fn as_str(self) -> &'static str {
        match self {
            Source::Reported => "reported",
            Source::Maturity => "maturity",
        }
    }

    /// The source stored as `word`, or `None` for a word no build wrote.
    pub fn parse(word: &str) -> Option<Source> {
        match word {
            "reported" => Some(Source::Reported),
            "maturity" => Some(Source::Maturity),
            _ => None,
        }
    }
}

/// One prediction id's outcome row.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Outcome {
    /// The recorded label (true for the positive class).
    pub label: bool,
    /// When the outcome happened (ms since the epoch).
    pub outcome_time_ms: i64,
    /// When it was received or settled (ms since the epoch); the hold counts from here.
    pub received_ms: i64,
    /// Who set the label.
    pub source: Source,
    /// How many times the label was replaced by a different one.
    pub revision: i64,
    /// Where the row stands.
    pub state: OutcomeState,
}

/// What an arriving outcome does.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Received {
    /// The row to store.
    pub next: Outcome,
    /// The answer to the client.
    pub status: OutcomeStatus,
    /// Whether the row before this one is copied to the history (a correction).
    pub archive: bool,
    /// Whether every prediction with the id is settled with `next.label` now (the running figures add it).
    pub settles: bool,
    /// The label a correction replaces; the running figures retract its pair.
    pub previous: Option<bool>,
}

impl Received {
    /// How many predictions the answer says got (or changed) their label, of `predictions` with the id.
    pub fn predictions_matched(&self, predictions: usize) -> usize {
        if self.settles {
            predictions
        } else {
            0
        }
    }
}

/// An outcome arrives for an id whose row is `existing`; `has_predictions` says whether a prediction with the id
/// is logged. `time_ms` is when the outcome happened, `now_ms` when it arrived.
pub fn receive(
    existing: Option<&Outcome>,
    has_predictions: bool,
    label: bool,
    time_ms: i64,
    now_ms: i64,
) -> Received {
    let state = if has_predictions {
        OutcomeState::Matched
    } else {
        OutcomeState::Pending
    };
    let fresh = |revision: i64| Outcome {
        label,
        outcome_time_ms: time_ms,
        received_ms: now_ms,
        source: Source::Reported,
        revision,
        state,
    };
    let first = if has_predictions {
        OutcomeStatus::Matched
    } else {
        OutcomeStatus::Pending
    };
    match existing {
        None => Received {
            next: fresh(0),
            status: first,
            archive: false,
            settles: has_predictions,
            previous: None,
        },
        // Sent again after its hold ran out: a fresh start, not a correction.
        Some(old) if old.state == OutcomeState::Unmatched => Received {
            next: fresh(old.revision),
            status: first,
            archive: false,
            settles: has_predictions,
            previous: None,
        },
        // The same label: nothing changes, except that a maturity-settled negative confirmed by the client is kept
        // as reported.
        Some(old) if old.label == label => Received {
            next: Outcome {
                source: Source::Reported,
                ..*old
            },
            status: if old.state == OutcomeState::Matched {
                OutcomeStatus::Duplicate
            } else {
                OutcomeStatus::Pending
            },
            archive: false,
            settles: false,
            previous: None,
        },
        // A different label replaces the recorded one.
        Some(old) => {
            let was_matched = old.state == OutcomeState::Matched;
            Received {
                next: fresh(old.revision + 1),
                status: if was_matched {
                    OutcomeStatus::Corrected
                } else {
                    first
                },
                archive: true,
                settles: has_predictions,
                previous: was_matched.then_some(old.label),
            }
        }
    }
}

/// A prediction with the id was just written (it was not logged before). Returns the row to store when the id's
/// outcome settles it now (a held outcome, or one already given to another prediction with the id); the new
/// prediction's pair is then `(next.label, no previous, next.outcome_time_ms)`.
pub fn prediction_written(existing: Option<&Outcome>) -> Option<Outcome> {
    match existing {
        Some(old) if old.state != OutcomeState::Unmatched => Some(Outcome {
            state: OutcomeState::Matched,
            ..*old
        }),
        _ => None,
    }
}

/// The maturity period of a route passed for an id whose first prediction was at `first_time_ms`. Returns the row
/// to store when the id has no matched outcome: a negative from the maturity rule at exactly
/// `first_time_ms + maturity_ms`, settling every prediction with the id (no previous label).
pub fn mature(
    existing: Option<&Outcome>,
    first_time_ms: i64,
    maturity_ms: i64,
    now_ms: i64,
) -> Option<Outcome> {
    if existing.is_some_and(|o| o.state == OutcomeState::Matched) {
        return None;
    }
    Some(Outcome {
        label: false,
        outcome_time_ms: first_time_ms.saturating_add(maturity_ms),
        received_ms: now_ms,
        source: Source::Maturity,
        revision: existing.map_or(0, |o| o.revision),
        state: OutcomeState::Matched,
    })
}

/// The hold check at `now_ms`: a held outcome received at least `hold_ms` ago becomes unmatched.
pub fn expire(existing: &Outcome, hold_ms: i64, now_ms: i64) -> Option<Outcome> {
    (existing.state == OutcomeState::Pending
        && existing.received_ms <= now_ms.saturating_sub(hold_ms))
    .then_some(Outcome {
        state: OutcomeState::Unmatched,
        ..*existing
    })
}

/// The newest receipt time at which a held outcome has run out its hold at `now_ms` (for a backend that expires
/// with one statement: `state = pending AND received_ms <= expiry_cutoff(..)`); the same test as [`expire`].
pub fn expiry_cutoff(hold_ms: i64, now_ms: i64) -> i64 {
    now_ms.saturating_sub(hold_ms)
}

#[cfg(test)]
mod tests {
    //! Property tests: an in-memory ledger driven only by the functions above. Any interleaving of predictions,
    //! outcomes (each id's outcomes in the client's order), maturity sweeps and repetitions of any message ends in
    //! the same rows, and the running figures (pairs added minus pairs retracted) count every labelled prediction
    //! exactly once with its final label.

    use std::collections::{BTreeMap, BTreeSet};

    use proptest::prelude::*;

    use super::*;

    /// A prediction: (id, role).
    type Key = (u8, u8);

    /// Per id the state and label; per (prediction, label) the net pairs.
    type Summary = (
        BTreeMap<u8, (OutcomeState, bool)>,
        BTreeMap<(Key, bool), i64>,
    );

    #[derive(Debug, Clone, Copy)]
    enum Event {
        Predict(Key),
        Outcome(u8, bool),
        Mature,
    }

    #[derive(Default)]
    struct Ledger {
        predictions: BTreeSet<Key>,
        outcomes: BTreeMap<u8, Outcome>,
        /// Per prediction: net count of settled pairs per label (adds minus retracts).
        net: BTreeMap<(Key, bool), i64>,
        now: i64,
    }

    const MATURITY: i64 = 1_000;

    impl Ledger {
        fn of(&self, id: u8) -> Vec<Key> {
            self.predictions
                .iter()
                .filter(|k| k.0 == id)
                .copied()
                .collect()
        }

        fn apply(&mut self, e: Event) {
            self.now += 1;
            match e {
                Event::Predict(key) => {
                    if !self.predictions.insert(key) {
                        return; // already logged: skipped
                    }
                    if let Some(next) = prediction_written(self.outcomes.get(&key.0)) {
                        self.outcomes.insert(key.0, next);
                        *self.net.entry((key, next.label)).or_default() += 1;
                    }
                }
                Event::Outcome(id, label) => {
                    let rows = self.of(id);
                    let r = receive(
                        self.outcomes.get(&id),
                        !rows.is_empty(),
                        label,
                        self.now,
                        self.now,
                    );
                    self.outcomes.insert(id, r.next);
                    if r.settles {
                        for k in rows {
                            *self.net.entry((k, label)).or_default() += 1;
                            if let Some(p) = r.previous {
                                *self.net.entry((k, p)).or_default() -= 1;
                            }
                        }
                    }
                }
                Event::Mature => {
                    let ids: BTreeSet<u8> = self.predictions.iter().map(|k| k.0).collect();
                    for id in ids {
                        if let Some(next) = mature(self.outcomes.get(&id), 0, MATURITY, self.now) {
                            self.outcomes.insert(id, next);
                            for k in self.of(id) {
                                *self.net.entry((k, false)).or_default() += 1;
                            }
                        }
                    }
                }
            }
        }

        /// What does not depend on the order: per id the state and label; the net pairs.
        fn summary(&self) -> Summary {
            let rows = self
                .outcomes
                .iter()
                .map(|(id, o)| (*id, (o.state, o.label)))
                .collect();
            let net = self
                .net
                .iter()
                .filter(|(_, n)| **n != 0)
                .map(|(k, n)| (*k, *n))
                .collect();
            (rows, net)
        }
    }

    /// Predictions (ids 0..6, roles 0..2), per-id outcome sequences, a maturity sweep flag, and an interleaving.
    fn scenario() -> impl Strategy<Value = (Vec<Event>, Vec<Event>)> {
        (
            prop::collection::btree_set((0u8..6, 0u8..2), 0..8),
            prop::collection::vec((0u8..6, any::<bool>()), 0..12),
            any::<bool>(),
            prop::collection::vec(any::<u32>(), 64),
            prop::collection::vec(0usize..64, 0..6),
        )
            .prop_map(|(preds, outs, sweep, keys, repeats)| {
                // Canonical order: every prediction, then the outcomes in the client's order, then the sweep.
                let mut canonical: Vec<Event> = preds.iter().map(|k| Event::Predict(*k)).collect();
                canonical.extend(outs.iter().map(|(id, l)| Event::Outcome(*id, *l)));
                if sweep {
                    canonical.push(Event::Mature);
                }
                // An interleaving: the predictions in any order, the outcomes (kept in the client's order) placed
                // anywhere among them, the sweep anywhere after the last prediction (a sweep before an id's
                // prediction rightly does not settle it, so that order is not the same scenario).
                let mut shuffled: Vec<(u32, Event)> = preds
                    .iter()
                    .zip(keys.iter())
                    .map(|(p, k)| (*k, Event::Predict(*p)))
                    .collect();
                shuffled.sort_by_key(|(key, _)| *key);
                let mut merged: Vec<Event> = shuffled.into_iter().map(|(_, e)| e).collect();
                let mut earliest = 0;
                for (i, (id, l)) in outs.iter().enumerate() {
                    let pick = keys[(i + 13) % keys.len()] as usize;
                    let at = earliest + pick % (merged.len() + 1 - earliest);
                    merged.insert(at, Event::Outcome(*id, *l));
                    earliest = at + 1;
                }
                if sweep {
                    let after = merged
                        .iter()
                        .rposition(|e| matches!(e, Event::Predict(_)))
                        .map_or(0, |p| p + 1);
                    let at = after + keys[63] as usize % (merged.len() + 1 - after);
                    merged.insert(at, Event::Mature);
                }
                // Repetitions: any message sent again right after itself.
                for r in repeats {
                    if !merged.is_empty() {
                        let at = r % merged.len();
                        let e = merged[at];
                        merged.insert(at + 1, e);
                    }
                }
                (canonical, merged)
            })
    }

    fn run(events: &[Event]) -> Ledger {
        let mut ledger = Ledger::default();
        for e in events {
            ledger.apply(*e);
        }
        ledger
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(512))]

        #[test]
        fn any_order_and_repetition_ends_in_the_same_state((canonical, shuffled) in scenario()) {
            let a = run(&canonical);
            let b = run(&shuffled);
            prop_assert_eq!(a.summary(), b.summary());
        }

        #[test]
        fn every_labelled_prediction_counts_once_with_its_final_label((_, events) in scenario()) {
            let ledger = run(&events);
            for key in &ledger.predictions {
                let final_label = ledger
                    .outcomes
                    .get(&key.0)
                    .filter(|o| o.state == OutcomeState::Matched)
                    .map(|o| o.label);
                for label in [false, true] {
                    let n = ledger.net.get(&(*key, label)).copied().unwrap_or(0);
                    prop_assert_eq!(n, i64::from(final_label == Some(label)), "{:?} label {}", key, label);
                }
            }
            // No pair for a prediction that was never logged.
            prop_assert!(ledger.net.iter().all(|((k, _), n)| *n == 0 || ledger.predictions.contains(k)));
        }

        #[test]
        fn a_repeated_outcome_changes_nothing(
            (_, events) in scenario(), id in 0u8..6, label in any::<bool>()
        ) {
            let mut ledger = run(&events);
            ledger.apply(Event::Outcome(id, label));
            let before = ledger.summary();
            let row = ledger.outcomes.get(&id).copied();
            ledger.apply(Event::Outcome(id, label));
            prop_assert_eq!(ledger.summary(), before);
            let again = ledger.outcomes.get(&id).copied();
            prop_assert_eq!(again.map(|o| (o.label, o.revision, o.outcome_time_ms)),
                row.map(|o| (o.label, o.revision, o.outcome_time_ms)));
        }

        #[test]
        fn a_held_outcome_expires_only_after_its_hold(received in 0i64..10_000, hold in 0i64..5_000, now in 0i64..20_000) {
            let held = Outcome {
                label: true, outcome_time_ms: received, received_ms: received,
                source: Source::Reported, revision: 0, state: OutcomeState::Pending,
            };
            let expired = expire(&held, hold, now);
            prop_assert_eq!(expired.is_some(), now - received >= hold);
            prop_assert_eq!(expired.is_some(), held.received_ms <= expiry_cutoff(hold, now));
            let matched = Outcome { state: OutcomeState::Matched, ..held };
            prop_assert!(expire(&matched, hold, now).is_none());
        }
    }

    #[test]
    fn words_round_trip() {
        for s in [
            OutcomeState::Pending,
            OutcomeState::Matched,
            OutcomeState::Unmatched,
        ] {
            assert_eq!(OutcomeState::parse(s.as_str()), Some(s));
        }
        for s in [Source::Reported, Source::Maturity] {
            assert_eq!(Source::parse(s.as_str()), Some(s));
        }
        assert_eq!(OutcomeState::parse("held"), None);
    }

    #[test]
    fn correction_after_maturity_retracts_the_negative() {
        let matured = mature(None, 100, 50, 1_000);
        assert_eq!(matured.map(|o| o.outcome_time_ms), Some(150));
        let r = receive(matured.as_ref(), true, true, 2_000, 2_000);
        assert_eq!(r.status, OutcomeStatus::Corrected);
        assert_eq!(r.previous, Some(false));
        assert!(r.archive && r.settles);
        assert_eq!(r.next.revision, 1);
        // Same label after maturity: a duplicate, the row now says the client reported it.
        let r = receive(matured.as_ref(), true, false, 2_000, 2_000);
        assert_eq!(r.status, OutcomeStatus::Duplicate);
        assert_eq!(r.next.source, Source::Reported);
        assert!(!r.settles);
    }
}
