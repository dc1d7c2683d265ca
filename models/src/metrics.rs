//! Scoring rules and drift statistics. PLACEHOLDER: to be completed by the scoring-rules work.
