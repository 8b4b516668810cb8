//! How each command's result is shown: one `Report` per result, for the
//! table, JSON, JSON Lines and CSV formats of `output.rs`.

use anyhow::Result;
use vitrine_engine::calibrate::{CalibrationReport, ThresholdPoint};
use vitrine_engine::clusters::ClusterReport;
use vitrine_engine::decisions::{Action, Fate, LoggedDecision};
use vitrine_engine::duplicates::{DuplicateGroup, DuplicateReport, DuplicateTier, LeakReport};
use vitrine_engine::labels::{
    LabelMethod, LabelSuggestion, LabelSuspect, SuggestionReport, SuspectReport,
};
use vitrine_engine::neighbours::Neighbour;
use vitrine_engine::status::{CollectionStatus, ErrorLine};

use crate::output::{opt, score, Report};

pub struct StatusTable(pub CollectionStatus);

impl Report for StatusTable {
    type Item = ErrorLine;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&ErrorLine> {
        self.0.error_list.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        if self.0.error_list.is_empty() {
            vec!["split", "label", "images"]
        } else {
            vec!["root", "path", "reason"]
        }
    }
    fn rows(&self) -> Vec<Vec<String>> {
        if self.0.error_list.is_empty() {
            self.0
                .labels
                .iter()
                .map(|(key, n)| {
                    let (split, label) = key.split_once('/').unwrap_or((key, ""));
                    vec![split.to_owned(), label.to_owned(), n.to_string()]
                })
                .collect()
        } else {
            self.0
                .error_list
                .iter()
                .map(|e| vec![e.root.clone(), e.path.clone(), e.reason.clone()])
                .collect()
        }
    }
    fn preamble(&self) -> Vec<String> {
        let mut lines = vec![
            format!(
                "collection: {} images, {} errors",
                self.0.images, self.0.errors
            ),
            format!("model: {}", self.0.model),
            format!(
                "index on disk: {:.1} MiB",
                self.0.index_disk_bytes as f64 / (1 << 20) as f64
            ),
        ];
        lines.extend(
            self.0
                .roots
                .iter()
                .map(|root| match self.0.images_per_root[root] {
                    0 => format!("root: {root} (no images)"),
                    1 => format!("root: {root} (1 image)"),
                    n => format!("root: {root} ({n} images)"),
                }),
        );
        let splits: Vec<String> = self
            .0
            .splits
            .iter()
            .map(|(s, n)| format!("{s} {n}"))
            .collect();
        lines.push(format!("splits: {}", splits.join(", ")));
        let decisions = &self.0.decisions;
        if decisions.in_effect + decisions.undone + decisions.stale > 0 {
            lines.push(format!(
                "decisions: {} in effect ({} dropped, {} kept, {} pairs not copies, {} labels, {} splits given), {} undone, {} stale",
                decisions.in_effect,
                decisions.dropped,
                decisions.kept,
                decisions.distinct_pairs,
                decisions.labels_given,
                decisions.splits_given,
                decisions.undone,
                decisions.stale
            ));
        }
        lines.push(String::new());
        lines
    }
}

pub struct NeighbourTable(pub Vec<Neighbour>);

impl Report for NeighbourTable {
    type Item = Neighbour;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&Neighbour> {
        self.0.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec!["rank", "similarity", "id", "split", "label", "path"]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .iter()
            .enumerate()
            .map(|(rank, n)| {
                vec![
                    (rank + 1).to_string(),
                    score(n.similarity),
                    n.image.id.to_string(),
                    opt(&n.image.split),
                    opt(&n.image.label),
                    n.image.path.clone(),
                ]
            })
            .collect()
    }
}

fn fate_name(fate: Fate) -> String {
    match fate {
        Fate::Keep => "keep".into(),
        Fate::Drop => "drop".into(),
    }
}

fn tier_name(tier: DuplicateTier) -> String {
    format!("{tier:?}").to_lowercase()
}

pub struct DuplicateTable(pub DuplicateReport);

impl Report for DuplicateTable {
    type Item = DuplicateGroup;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&DuplicateGroup> {
        self.0.groups.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec![
            "group",
            "keep",
            "tier",
            "copy of",
            "similarity",
            "id",
            "split",
            "size",
            "path",
            "decision",
        ]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        let mut rows = Vec::new();
        for (index, group) in self.0.groups.iter().enumerate() {
            for member in &group.members {
                rows.push(vec![
                    (index + 1).to_string(),
                    if member.keeper {
                        "*".into()
                    } else {
                        String::new()
                    },
                    member.tier.map(tier_name).unwrap_or_default(),
                    member.copy_of.map(|id| id.to_string()).unwrap_or_default(),
                    score(member.similarity),
                    member.image.id.to_string(),
                    opt(&member.image.split),
                    format!("{}x{}", member.width, member.height),
                    member.image.path.clone(),
                    member.decision.map(fate_name).unwrap_or_default(),
                ]);
            }
        }
        rows
    }
    fn preamble(&self) -> Vec<String> {
        let images: usize = self.0.groups.iter().map(|g| g.members.len()).sum();
        let verification = &self.0.verification;
        let decided = self.0.groups.iter().filter(|g| g.decided).count();
        let mut lines = vec![format!(
            "{} duplicate groups, {images} images, {decided} groups decided; * marks the suggested keeper (nothing is deleted)",
            self.0.groups.len()
        )];
        if self.0.left_out_as_distinct > 0 {
            lines.push(format!(
                "{} pairs left out: decided not to be copies",
                self.0.left_out_as_distinct
            ));
        }
        if verification.applied {
            lines.push(format!(
                "near pairs verified: {} candidates, {} confirmed ({} below the threshold), {} rejected above it",
                verification.candidate_pairs,
                verification.confirmed,
                verification.recovered_below_threshold,
                verification.rejected_above_threshold
            ));
        }
        if let Some(note) = &verification.note {
            lines.push(format!("note: {note}"));
        }
        lines.push(String::new());
        lines
    }
}

pub struct LeakTable(pub LeakReport);

impl Report for LeakTable {
    type Item = vitrine_engine::duplicates::Leak;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&Self::Item> {
        self.0.leaks.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec![
            "split",
            "path",
            "tier",
            "similarity",
            "counterpart",
            "decided",
        ]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .leaks
            .iter()
            .map(|leak| {
                vec![
                    opt(&leak.image.split),
                    leak.image.path.clone(),
                    tier_name(leak.tier),
                    score(leak.similarity),
                    leak.counterpart.path.clone(),
                    if leak.decided {
                        "yes".into()
                    } else {
                        String::new()
                    },
                ]
            })
            .collect()
    }
    fn preamble(&self) -> Vec<String> {
        let from = match &self.0.reference_split {
            Some(reference) => reference.clone(),
            None => "an earlier split".into(),
        };
        let mut lines: Vec<String> = self
            .0
            .summary
            .iter()
            .map(|s| {
                format!(
                    "{}: {} of {} images leaked from {from} ({:.1}%)",
                    s.split, s.leaked, s.images, s.leaked_percent
                )
            })
            .collect();
        if !self.0.between.is_empty() {
            let pairs: Vec<String> = self
                .0
                .between
                .iter()
                .map(|p| format!("{} from {} {}", p.split, p.from, p.leaked))
                .collect();
            lines.push(format!("between splits: {}", pairs.join(", ")));
            let labels: Vec<String> = self
                .0
                .per_label
                .iter()
                .map(|l| format!("{} {}", l.label, l.leaked))
                .collect();
            lines.push(format!("per label: {}", labels.join(", ")));
        }
        let decided = self.0.leaks.iter().filter(|l| l.decided).count();
        lines.push(format!("{decided} of {} leaks decided", self.0.leaks.len()));
        if self.0.left_out_as_distinct > 0 {
            lines.push(format!(
                "{} pairs left out: decided not to be copies",
                self.0.left_out_as_distinct
            ));
        }
        lines.push(String::new());
        lines
    }
}

pub struct ClusterTable(pub ClusterReport);

impl Report for ClusterTable {
    type Item = vitrine_engine::clusters::ClusterSummary;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&Self::Item> {
        self.0.clusters.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec![
            "cluster",
            "size",
            "tightness",
            "cohesion",
            "top labels (of labelled)",
            "splits",
            "medoid",
        ]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .clusters
            .iter()
            .map(|c| {
                let labels: Vec<String> = c
                    .top_labels
                    .iter()
                    .take(3)
                    .map(|l| format!("{} {:.0}%", l.label, 100.0 * l.share))
                    .collect();
                let splits: Vec<String> = c
                    .split_mix
                    .iter()
                    .map(|s| format!("{} {}", s.split, s.count))
                    .collect();
                let labels = if c.labelled_members == 0 {
                    "(no labels)".to_owned()
                } else {
                    format!("{} (of {})", labels.join(", "), c.labelled_members)
                };
                vec![
                    c.index.to_string(),
                    c.size.to_string(),
                    score(c.tightness),
                    score(c.cohesion),
                    labels,
                    splits.join(", "),
                    c.medoid.path.clone(),
                ]
            })
            .collect()
    }
    fn preamble(&self) -> Vec<String> {
        let mut lines = vec![
            format!(
                "{} clusters (spherical k-means, seed {}; number {})",
                self.0.n_clusters, self.0.seed, self.0.chosen_by
            ),
            format!(
                "tightness: 0 as loose as the whole collection (cohesion {:.3}), 1 every member the same picture",
                self.0.collection_cohesion
            ),
        ];
        lines.extend(self.0.note.iter().map(|note| format!("note: {note}")));
        lines.push(String::new());
        lines
    }
}

pub struct CalibrationTable(pub CalibrationReport);

impl Report for CalibrationTable {
    type Item = ThresholdPoint;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&ThresholdPoint> {
        self.0.points.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec![
            "threshold",
            "precision",
            "recall mild",
            "recall strong",
            "false positives",
            "recall decided",
        ]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .points
            .iter()
            .map(|p| {
                vec![
                    format!("{:.3}", p.threshold),
                    format!("{:.3}", p.precision),
                    format!("{:.3}", p.recall_mild),
                    format!("{:.3}", p.recall_strong),
                    p.false_positives.to_string(),
                    p.recall_decided
                        .map(|r| format!("{r:.3}"))
                        .unwrap_or_default(),
                ]
            })
            .collect()
    }
    fn preamble(&self) -> Vec<String> {
        let r = &self.0;
        let mut lines = vec![
            format!(
                "{} originals ({} unreadable skipped): {} mild and {} strong copies, {} nearest distinct images (highest similarity {:.3})",
                r.originals, r.unreadable, r.mild_copies, r.strong_copies, r.negatives, r.max_negative_similarity
            ),
            format!(
                "decided by people: {} copies (recall per threshold), {} pairs not copies (among the negatives)",
                r.decided_copies, r.decided_not_copies
            ),
            match r.recommended_threshold {
                Some(t) => format!("recommended threshold: {t:.3}"),
                None => "no threshold reaches the target precision on this sample".into(),
            },
            format!("rule: {}", r.rule),
            String::new(),
        ];
        lines.extend(r.edits.iter().map(|e| {
            format!(
                "  {:<14} {:?}: similarity to original min {:.3}, mean {:.3}",
                e.edit, e.severity, e.min_similarity, e.mean_similarity
            )
        }));
        lines.push(String::new());
        lines
    }
}

fn method_name(method: LabelMethod) -> &'static str {
    match method {
        LabelMethod::Classifier => "a logistic regression trained on the collection's labels",
        LabelMethod::NeighbourVote => "a vote of labelled neighbours",
    }
}

pub struct SuggestionTable(pub SuggestionReport);

impl Report for SuggestionTable {
    type Item = LabelSuggestion;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&LabelSuggestion> {
        self.0.suggestions.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec!["path", "suggested", "confidence", "leading"]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .suggestions
            .iter()
            .map(|s| {
                vec![
                    s.image.path.clone(),
                    s.suggested_label
                        .clone()
                        .unwrap_or_else(|| "(abstain)".into()),
                    score(s.confidence),
                    opt(&s.leading_label),
                ]
            })
            .collect()
    }
    fn preamble(&self) -> Vec<String> {
        let report = &self.0;
        let made = report.suggestions.iter().filter(|s| !s.abstained).count();
        let mut lines = vec![format!(
            "{made} of {} unlabelled images get a suggestion from {}, at confidence {:.3} or more",
            report.suggestions.len(),
            method_name(report.method),
            report.cut
        )];
        if let Some(accuracy) = report.expected_accuracy {
            lines.push(format!(
                "expected accuracy at that cut: {:.1}% (labelled images judged by models that did not see them)",
                100.0 * accuracy
            ));
        }
        lines.extend(report.note.iter().map(|note| format!("note: {note}")));
        lines.push(String::new());
        lines
    }
}

pub struct SuspectTable(pub SuspectReport);

impl Report for SuspectTable {
    type Item = LabelSuspect;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&LabelSuspect> {
        self.0.suspects.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec![
            "path",
            "label",
            "disagreement",
            "points to",
            "its probability",
        ]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .suspects
            .iter()
            .map(|s| {
                vec![
                    s.image.path.clone(),
                    opt(&s.image.label),
                    score(s.disagreement),
                    opt(&s.suggested_label),
                    score(s.confidence),
                ]
            })
            .collect()
    }
    fn preamble(&self) -> Vec<String> {
        let report = &self.0;
        let counts: Vec<String> = report
            .per_label
            .iter()
            .map(|c| format!("{} {} of {}", c.label, c.suspects, c.labelled))
            .collect();
        let mut lines = vec![
            format!(
                "{} suspects by {}; per label: {}",
                report.suspects.len(),
                method_name(report.method),
                counts.join(", ")
            ),
            "a label with many suspects is more likely an ambiguous class than many mistakes"
                .into(),
        ];
        lines.extend(report.note.iter().map(|note| format!("note: {note}")));
        lines.push(String::new());
        lines
    }
}

pub struct DecisionTable(pub Vec<LoggedDecision>);

/// The action's name and what it names, for tables and CSV.
pub fn action_cells(action: &Action) -> [String; 3] {
    match action {
        Action::Drop { image } => ["drop".into(), image.path.clone(), String::new()],
        Action::Keep { image } => ["keep".into(), image.path.clone(), String::new()],
        Action::Distinct { first, second } => {
            ["distinct".into(), first.path.clone(), second.path.clone()]
        }
        Action::Label { image, label } => ["label".into(), image.path.clone(), label.clone()],
        Action::RejectSuggestion { image } => [
            "reject_suggestion".into(),
            image.path.clone(),
            String::new(),
        ],
        Action::Split { image, split } => ["split".into(), image.path.clone(), split.clone()],
        Action::Undo { decision } => ["undo".into(), decision.to_string(), String::new()],
    }
}

impl Report for DecisionTable {
    type Item = LoggedDecision;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&LoggedDecision> {
        self.0.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec![
            "number",
            "at_unix_s",
            "by",
            "action",
            "subject",
            "detail",
            "state",
        ]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .iter()
            .map(|d| {
                let [action, subject, detail] = action_cells(&d.decision.action);
                let state = match (d.undone_by, d.stale) {
                    (Some(undo), _) => format!("undone by {undo}"),
                    (None, true) => "stale: the file changed or is gone".into(),
                    (None, false) => "in effect".into(),
                };
                vec![
                    d.number.to_string(),
                    d.decision.at_unix_s.to_string(),
                    d.decision.by.clone(),
                    action,
                    subject,
                    detail,
                    state,
                ]
            })
            .collect()
    }
}
