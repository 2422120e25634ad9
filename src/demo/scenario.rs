//! An invented scenario for the demo and the tests: Harbourline Trade Credit, a small-business
//! invoice-finance lender, scores invoices for the chance the debtor pays more than 30 days
//! late. Synthetic from a fixed seed; the features match the embedded default config.
//!
//! The world has two regimes. In `Before`, lateness is driven mostly by the debtor's history and
//! credit utilisation. In `After` (say, an interest-rate rise), construction, hospitality and
//! wholesale debtors turn late, long payment terms matter much more and history matters less, so
//! a model fitted on `Before` goes stale.

use rand::Rng;
use rand_distr::{Distribution, LogNormal, Normal, Poisson};
use serde_json::{json, Map, Value as Json};

use crate::model::logistic::sigmoid;

pub const SECTORS: [&str; 6] = [
    "construction",
    "retail",
    "wholesale",
    "logistics",
    "healthcare",
    "hospitality",
];
pub const CHANNELS: [&str; 3] = ["portal", "email", "edi"];
const TERMS: [f64; 5] = [14.0, 30.0, 45.0, 60.0, 90.0];

/// Which relationship between features and outcome holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Regime {
    Before,
    After,
}

/// One synthetic invoice: the features a backend would send, and the true chance it pays late.
#[derive(Debug, Clone)]
pub struct Invoice {
    pub features: Map<String, Json>,
    pub probability: f64,
}

impl Invoice {
    /// Draws the outcome (1 = paid late) from the true probability.
    pub fn draw_label<R: Rng>(&self, rng: &mut R) -> u8 {
        u8::from(rng.gen::<f64>() < self.probability)
    }
}

/// Draws one invoice under `regime`.
pub fn invoice<R: Rng>(rng: &mut R, regime: Regime) -> Invoice {
    let amount: f64 = LogNormal::<f64>::new(9.6, 1.0)
        .expect("valid")
        .sample(rng)
        .clamp(50.0, 4_900_000.0);
    let days: f64 = TERMS[rng.gen_range(0..TERMS.len())];
    let years: f64 = Normal::<f64>::new(2.0, 0.9)
        .expect("valid")
        .sample(rng)
        .exp()
        .min(150.0);
    let late: f64 = Poisson::new(0.8).expect("valid").sample(rng);
    let utilisation: f64 = rng.gen_range(0.0..1.25);
    let sector = rng.gen_range(0..SECTORS.len());
    let channel = rng.gen_range(0..CHANNELS.len());

    let log_amount = (amount / 15_000.0).ln();
    let logit = match regime {
        Regime::Before => {
            let sector_effect = [0.5, 0.1, 0.0, -0.2, -0.5, 0.3][sector];
            -1.7 + 0.25 * log_amount + 0.01 * (days - 30.0) - 0.3 * years.ln()
                + 0.6 * late
                + 1.6 * (utilisation - 0.6)
                + sector_effect
                + [0.0, 0.25, -0.15][channel]
        }
        Regime::After => {
            let sector_effect = [1.6, -0.4, 1.1, -0.3, -1.0, 1.4][sector];
            -1.9 + 0.25 * log_amount + 0.04 * (days - 30.0) - 0.1 * years.ln() + 0.2 * late
                - 0.4 * (utilisation - 0.6)
                + sector_effect
                + [0.0, 0.25, -0.15][channel]
        }
    };

    let mut features = Map::new();
    features.insert(
        "invoice_amount".into(),
        json!((amount * 100.0).round() / 100.0),
    );
    features.insert("days_to_due".into(), json!(days));
    // Some debtors' trading history is unknown: sent as null, imputed by the model.
    let years_value = if rng.gen_bool(0.05) {
        Json::Null
    } else {
        json!((years * 10.0).round() / 10.0)
    };
    features.insert("debtor_years_trading".into(), years_value);
    // Some backends leave out a zero count (the config fills 0).
    if late > 0.0 || rng.gen_bool(0.7) {
        features.insert("prior_late_invoices".into(), json!(late));
    }
    features.insert(
        "credit_utilisation".into(),
        json!((utilisation * 1000.0).round() / 1000.0),
    );
    features.insert("debtor_sector".into(), json!(SECTORS[sector]));
    features.insert("submission_channel".into(), json!(CHANNELS[channel]));
    Invoice {
        features,
        probability: sigmoid(logit),
    }
}

/// The columns of [`labeled_csv`], in order: what `understudy import` reads.
pub const CSV_HEADER: &str = "id,event_time,invoice_amount,days_to_due,debtor_years_trading,\
prior_late_invoices,credit_utilisation,debtor_sector,submission_channel,paid_late";

/// `rows` labeled invoices of the `Before` regime as CSV (with [`CSV_HEADER`]), one a minute
/// from `start_ms`: invented rows to try `init --from-csv`, `import` and `train` on.
pub fn labeled_csv<R: Rng>(rng: &mut R, rows: usize, start_ms: i64) -> String {
    labeled_csv_regimes(rng, &[(Regime::Before, rows)], start_ms, 60_000)
}

/// Labeled invoices regime by regime (`(regime, rows)` in order) as CSV with [`CSV_HEADER`],
/// one every `spacing_ms` from `start_ms`: a history with a change in it, for `backtest`.
pub fn labeled_csv_regimes<R: Rng>(
    rng: &mut R,
    regimes: &[(Regime, usize)],
    start_ms: i64,
    spacing_ms: i64,
) -> String {
    let mut out = format!("{CSV_HEADER}\n");
    let mut i = 0usize;
    for &(regime, rows) in regimes {
        for _ in 0..rows {
            let invoice = invoice(rng, regime);
            let cell = |name: &str| match invoice.features.get(name) {
                Some(Json::String(text)) => text.clone(),
                Some(Json::Number(number)) => number.to_string(),
                _ => String::new(),
            };
            let label = invoice.draw_label(rng);
            out.push_str(&format!(
                "inv-{i},{},{},{},{},{},{},{},{},{label}\n",
                crate::time::to_rfc3339(start_ms + i as i64 * spacing_ms),
                cell("invoice_amount"),
                cell("days_to_due"),
                cell("debtor_years_trading"),
                cell("prior_late_invoices"),
                cell("credit_utilisation"),
                cell("debtor_sector"),
                cell("submission_channel"),
            ));
            i += 1;
        }
    }
    out
}

#[cfg(test)]
mod csv_tests {
    use super::*;
    use rand::SeedableRng;

    #[test]
    fn the_invented_csv_is_read_back_by_the_importer_row_for_row() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let start = crate::time::now_ms() - 1000 * 60_000;
        let text = labeled_csv(&mut rng, 200, start);
        let schema = crate::config::Config::embedded_default().schema();
        let rows =
            crate::ingest::csv::read_csv_from(text.as_bytes(), "invented.csv", &schema).unwrap();
        assert_eq!(rows.len(), 200);
        assert_eq!(rows[199].id, "inv-199");
        assert_eq!(rows[1].event_time - rows[0].event_time, 60_000);
    }
}
