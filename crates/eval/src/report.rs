//! The outcome of one evaluation run, serialisable for `--json` and
//! renderable as Markdown or a plain-text table.

use std::collections::BTreeMap;

use serde::Serialize;

use crate::Reliability;

use crate::{KnownMislabels, TaggingOrder};

/// Everything measured in one run: the split, then one entry per method.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Report {
    pub split: SplitSummary,
    pub methods: BTreeMap<String, MethodReport>,
    /// Tag completion: the same test pictures revealing half of their tags; absent
    /// when no test picture carries two known tags.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub completion: Option<Completion>,
    /// Out-of-fold audit against pictures known to carry a wrong tag, when
    /// the caller has such a list (see [`crate::audit_out_of_fold`]).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub known_mislabels: Option<KnownMislabels>,
    /// Which pictures to tag next, simulated ([`crate::simulate_tagging_order`]), when asked.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub tagging_order: Option<TaggingOrder>,
}

/// Tag completion on the test pictures with two or more known tags: ⌊n/2⌋ of each
/// one's tags revealed (chosen by the seed), the others ranked.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Completion {
    pub split: CompletionSplit,
    pub methods: BTreeMap<String, crate::CompletionReport>,
}

#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct CompletionSplit {
    /// Test pictures that reveal some tags.
    pub pictures: usize,
    /// Tags revealed, over all of them.
    pub revealed: usize,
    /// Tags to be found, over all of them.
    pub hidden: usize,
}

/// How the pictures were divided and what could be measured on them.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct SplitSummary {
    pub seed: u64,
    /// Train pictures the methods learned from (those carrying a tag).
    pub train: usize,
    /// Train-side pictures without any tag: unknown, not "no tag applies", so left out.
    pub train_untagged: usize,
    /// Test pictures in the split.
    pub test: usize,
    /// Test pictures with no tag known from train: excluded from every metric.
    pub test_without_known_tags: usize,
    /// Tags seen on train pictures: the columns every method scores.
    pub vocabulary: usize,
    /// Distinct test tags that no train picture carries (dropped).
    pub unseen_test_tags: usize,
    /// One-tag search queries (tags on at least 2 measured test pictures).
    pub search_tags: usize,
    /// Two-tag search queries.
    pub search_pairs: usize,
    /// Test pictures given another picture's tags for the mislabel measurement.
    pub mislabelled: usize,
}

/// One method's results on the measured test pictures (see `metrics` for definitions).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MethodReport {
    /// Settings the method chose while fitting (e.g. "k=10").
    pub settings: Option<String>,
    /// Mean label-ranking average precision per picture.
    pub lrap: f64,
    pub p_at_1: f64,
    pub p_at_5: f64,
    pub r_at_5: f64,
    /// Mean coverage error (lower is better).
    pub coverage: f64,
    /// Mean per-tag precision of top-5 annotation.
    pub tag_precision: f64,
    /// Mean per-tag recall of top-5 annotation.
    pub tag_recall: f64,
    /// Tags suggested correctly at least once.
    pub n_plus: usize,
    /// mAP of one-tag search; absent when no tag qualifies.
    pub search_map: Option<f64>,
    /// mAP of two-tag search; absent when no pair qualifies.
    pub search_map_pairs: Option<f64>,
    /// ROC AUC of finding the swapped tag sets; absent without swaps.
    pub mislabel_auc: Option<f64>,
    /// Precision of the top-m disputed pictures, m = number swapped.
    pub mislabel_precision: Option<f64>,
    /// Wall-clock time of fit plus score.
    pub seconds: f64,
    /// Stated probability against observed frequency on the test pictures, for
    /// methods that claim calibrated probabilities.
    pub reliability: Option<Reliability>,
}

const COLUMNS: [&str; 15] = [
    "method",
    "settings",
    "LRAP",
    "P@1",
    "P@5",
    "R@5",
    "coverage",
    "tag P",
    "tag R",
    "N+",
    "search mAP",
    "pair mAP",
    "mislabel AUC",
    "mislabel P",
    "seconds",
];

fn number(v: f64) -> String {
    format!("{v:.3}")
}

fn optional(v: Option<f64>) -> String {
    v.map_or_else(|| "-".to_string(), number)
}

impl Report {
    fn summary_line(&self) -> String {
        let s = &self.split;
        format!(
            "seed {}: {} train pictures ({} untagged left out), {} test pictures ({} without a known tag, not measured); \
             vocabulary {} tags, {} test tags unseen in train; search queries: {} tags, {} tag pairs; {} pictures mislabelled on purpose",
            s.seed,
            s.train,
            s.train_untagged,
            s.test,
            s.test_without_known_tags,
            s.vocabulary,
            s.unseen_test_tags,
            s.search_tags,
            s.search_pairs,
            s.mislabelled
        )
    }

    fn rows(&self) -> Vec<Vec<String>> {
        self.methods
            .iter()
            .map(|(name, m)| {
                vec![
                    name.clone(),
                    m.settings.clone().unwrap_or_else(|| "-".to_string()),
                    number(m.lrap),
                    number(m.p_at_1),
                    number(m.p_at_5),
                    number(m.r_at_5),
                    number(m.coverage),
                    number(m.tag_precision),
                    number(m.tag_recall),
                    m.n_plus.to_string(),
                    optional(m.search_map),
                    optional(m.search_map_pairs),
                    optional(m.mislabel_auc),
                    optional(m.mislabel_precision),
                    format!("{:.2}", m.seconds),
                ]
            })
            .collect()
    }

    /// The split summary as a paragraph, then a Markdown table, one row per
    /// method; then the known-mislabel paragraph and table, if measured.
    pub fn to_markdown(&self) -> String {
        let mut out = format!("{}\n\n", self.summary_line());
        out += &markdown_table(&COLUMNS, &self.rows());
        if let Some(completion) = &self.completion {
            out += &format!("\n{}\n\n", completion.summary_line());
            out += &markdown_table(&Completion::COLUMNS, &completion.rows());
        }
        if let Some(known) = &self.known_mislabels {
            out += &format!("\n{}\n\n", known.summary_line());
            out += &markdown_table(&known.columns(), &known.rows());
        }
        if let Some(order) = &self.tagging_order {
            out += &format!("\n{}\n\n", order.summary_line());
            out += &markdown_table(&order.columns(), &order.rows());
        }
        for (name, reliability) in self.reliabilities() {
            out += &format!(
                "\nreliability of {name}'s probabilities on the test pictures:\n\n```\n{}```\n",
                reliability.to_table()
            );
        }
        out
    }

    fn reliabilities(&self) -> impl Iterator<Item = (&String, &Reliability)> {
        self.methods
            .iter()
            .filter_map(|(name, m)| m.reliability.as_ref().map(|r| (name, r)))
    }

    /// The same as [`Report::to_markdown`], as aligned plain text for terminals.
    pub fn to_table(&self) -> String {
        let mut out = format!("{}\n", self.summary_line());
        out += &aligned_table(&COLUMNS, &self.rows(), 2);
        if let Some(completion) = &self.completion {
            out += &format!("\n{}\n", completion.summary_line());
            out += &aligned_table(&Completion::COLUMNS, &completion.rows(), 2);
        }
        if let Some(known) = &self.known_mislabels {
            out += &format!("\n{}\n", known.summary_line());
            out += &aligned_table(&known.columns(), &known.rows(), 1);
        }
        if let Some(order) = &self.tagging_order {
            out += &format!("\n{}\n", order.summary_line());
            out += &aligned_table(&order.columns(), &order.rows(), 1);
        }
        for (name, reliability) in self.reliabilities() {
            out += &format!(
                "\nreliability of {name}'s probabilities on the test pictures:\n{}",
                reliability.to_table()
            );
        }
        out
    }
}

impl Report {
    /// The report with every timing zeroed, to compare runs.
    pub fn without_timings(mut self) -> Report {
        self.methods.values_mut().for_each(|m| m.seconds = 0.0);
        if let Some(c) = &mut self.completion {
            c.methods.values_mut().for_each(|m| m.seconds = 0.0);
        }
        self
    }
}

impl Completion {
    const COLUMNS: [&'static str; 7] =
        ["method", "settings", "LRAP", "P@1", "P@5", "R@5", "seconds"];

    fn summary_line(&self) -> String {
        format!(
            "tag completion: {} test pictures with two or more tags show {} of them; the other {} \
             are ranked (LRAP etc. over the tags not shown)",
            self.split.pictures, self.split.revealed, self.split.hidden
        )
    }

    fn rows(&self) -> Vec<Vec<String>> {
        self.methods
            .iter()
            .map(|(name, m)| {
                vec![
                    name.clone(),
                    m.settings.clone().unwrap_or_default(),
                    number(m.lrap),
                    number(m.p_at_1),
                    number(m.p_at_5),
                    number(m.r_at_5),
                    format!("{:.1}", m.seconds),
                ]
            })
            .collect()
    }
}

impl KnownMislabels {
    fn summary_line(&self) -> String {
        format!(
            "known mislabels: {} tagged pictures, each judged by methods fitted on the other {} of {} folds; {} known to carry a wrong tag",
            self.pictures,
            self.folds.saturating_sub(1),
            self.folds,
            self.known
        )
    }

    fn columns(&self) -> [String; 3] {
        [
            "method".to_string(),
            "known-mislabel AUC".to_string(),
            format!("precision in top {}", self.known),
        ]
    }

    fn rows(&self) -> Vec<Vec<String>> {
        self.methods
            .iter()
            .map(|(name, m)| vec![name.clone(), optional(m.auc), optional(m.precision)])
            .collect()
    }
}

pub(crate) fn markdown_table<S: AsRef<str>>(header: &[S], rows: &[Vec<String>]) -> String {
    let line = |cells: Vec<&str>| format!("| {} |\n", cells.join(" | "));
    let mut out = line(header.iter().map(AsRef::as_ref).collect());
    out += &line(header.iter().map(|_| "---").collect());
    for row in rows {
        out += &line(row.iter().map(String::as_str).collect());
    }
    out
}

/// Columns padded to their widest cell: the first `text_columns` left-aligned, numbers right-aligned.
pub(crate) fn aligned_table<S: AsRef<str>>(
    header: &[S],
    rows: &[Vec<String>],
    text_columns: usize,
) -> String {
    let header: Vec<String> = header.iter().map(|c| c.as_ref().to_string()).collect();
    let widths: Vec<usize> = (0..header.len())
        .map(|c| {
            rows.iter()
                .chain([&header])
                .map(|r| r[c].chars().count())
                .max()
                .unwrap_or(0)
        })
        .collect();
    let mut out = String::new();
    for row in [&header].into_iter().chain(rows) {
        let cells: Vec<String> = row
            .iter()
            .zip(&widths)
            .enumerate()
            .map(|(c, (cell, &w))| {
                if c < text_columns {
                    format!("{cell:<w$}")
                } else {
                    format!("{cell:>w$}")
                }
            })
            .collect();
        out += cells.join("  ").trim_end();
        out.push('\n');
    }
    out
}
