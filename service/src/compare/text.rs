//! The comparison as a plain-text table.

use std::fmt::Write as _;

use serde_json::Value;

use super::CompareReport;

fn num(v: &Value, digits: usize) -> String {
    match v.as_f64() {
        Some(x) => format!("{x:.digits$}"),
        None => "-".to_string(),
    }
}

/// Renders the report for a terminal.
pub fn render(r: &CompareReport) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "route {}: champion {} ({} predictions) against challenger {} ({} predictions)",
        r.route, r.champion, r.champion_predictions, r.challenger, r.challenger_predictions
    );
    let _ = writeln!(
        s,
        "paired ids: {} ({} with an outcome)\n",
        r.paired, r.paired_with_outcome
    );
    if let Some(g) = &r.agreement {
        let _ = writeln!(
            s,
            "before outcomes (adjusted log-odds, challenger minus champion)"
        );
        let _ = writeln!(
            s,
            "  Spearman rank correlation   {}",
            num(&g["spearman"], 4)
        );
        let _ = writeln!(
            s,
            "  mean difference             {}",
            num(&g["mean_log_odds_difference"], 4)
        );
        let _ = writeln!(
            s,
            "  mean |difference|           {}",
            num(&g["mean_absolute_log_odds_difference"], 4)
        );
        let _ = writeln!(
            s,
            "  largest |difference|        {}",
            num(&g["max_absolute_log_odds_difference"], 4)
        );
        if let Some(f) = g["decision_flips"].as_object() {
            let _ = writeln!(
                s,
                "  decisions flipped at p > {}  {} ({} champion-only, {} challenger-only positive)",
                num(&f["threshold"], 4),
                num(&f["share"], 4),
                f["champion_only_positive"],
                f["challenger_only_positive"]
            );
        }
        let _ = writeln!(
            s,
            "  PSI challenger vs champion  {} ({} bins at the champion's quantiles, {})\n",
            num(&g["psi"], 4),
            g["psi_bins"],
            g["psi_rule"].as_str().unwrap_or_default()
        );
    }
    let o = &r.outcomes;
    let _ = writeln!(
        s,
        "with outcomes: {} cases ({} positive, {} negative)",
        o["cases"], o["positives"], o["negatives"]
    );
    let _ = writeln!(
        s,
        "  {:<12} {:>10} {:>10} {:>10} {:>10}",
        "", "log-loss", "Brier", "ECE", "AUC"
    );
    for side in ["champion", "challenger"] {
        let m = &o[side];
        let auc = &o["delong"][format!("auc_{side}")];
        let _ = writeln!(
            s,
            "  {side:<12} {:>10} {:>10} {:>10} {:>10}",
            num(&m["log_loss"], 5),
            num(&m["brier"], 5),
            num(&m["ece"], 5),
            num(auc, 4)
        );
    }
    for (name, t, key) in [
        ("log-loss", &o["log_loss_test"], "mean_difference"),
        ("Brier", &o["brier_test"], "mean_difference"),
        ("AUC (DeLong)", &o["delong"], "difference"),
    ] {
        if t.is_object() {
            let _ = writeln!(
                s,
                "  {name:<12} difference {} (se {}), z {}, p {}",
                num(&t[key], 5),
                num(&t["standard_error"], 5),
                num(
                    if t["statistic"].is_null() {
                        &t["z"]
                    } else {
                        &t["statistic"]
                    },
                    3
                ),
                num(&t["p_value"], 4)
            );
        }
    }
    super::always_valid::render(&mut s, &r.always_valid, &r.fixed_sample_verdict);
    let _ = writeln!(s, "\nverdict: {}", r.verdict);
    s
}
