//! Impurity measures and split scores for two classes.
//!
//! All functions take *weighted* class totals `[clear, target]` (class
//! weights already applied) so the same code serves unweighted and
//! class-weighted learning. Entropy is in bits (log base 2).

use serde::{Deserialize, Serialize};

/// How a split's quality is measured.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Criterion {
    /// Gini impurity decrease (Breiman et al., 1984).
    Gini,
    /// Information gain: entropy decrease (Quinlan, 1986).
    Entropy,
    /// Information gain divided by the split's own entropy (Quinlan, 1993).
    GainRatio,
}

impl Criterion {
    pub fn name(self) -> &'static str {
        match self {
            Criterion::Gini => "gini",
            Criterion::Entropy => "entropy",
            Criterion::GainRatio => "gain-ratio",
        }
    }

    pub fn parse(s: &str) -> Option<Criterion> {
        match s {
            "gini" => Some(Criterion::Gini),
            "entropy" => Some(Criterion::Entropy),
            "gain-ratio" => Some(Criterion::GainRatio),
            _ => None,
        }
    }

    /// Impurity of a node: Gini for `gini`, entropy otherwise.
    #[inline]
    pub fn impurity(self, w: [f64; 2]) -> f64 {
        match self {
            Criterion::Gini => gini(w),
            Criterion::Entropy | Criterion::GainRatio => entropy(w),
        }
    }
}

/// Gini impurity `1 - p0^2 - p1^2` (= `2 p (1 - p)` for two classes).
#[inline]
pub fn gini(w: [f64; 2]) -> f64 {
    let n = w[0] + w[1];
    if n <= 0.0 {
        return 0.0;
    }
    let p = w[1] / n;
    2.0 * p * (1.0 - p)
}

/// Shannon entropy in bits.
#[inline]
pub fn entropy(w: [f64; 2]) -> f64 {
    let n = w[0] + w[1];
    if n <= 0.0 {
        return 0.0;
    }
    let mut h = 0.0;
    for &c in &w {
        if c > 0.0 {
            let p = c / n;
            h -= p * p.log2();
        }
    }
    h
}

/// Impurity decrease of splitting `parent` into `left` and `right`
/// (`parent = left + right`): `I(parent) - |L|/|P| I(L) - |R|/|P| I(R)`.
#[inline]
pub fn gain(criterion: Criterion, parent: [f64; 2], left: [f64; 2], right: [f64; 2]) -> f64 {
    let n = parent[0] + parent[1];
    if n <= 0.0 {
        return 0.0;
    }
    let nl = left[0] + left[1];
    let nr = right[0] + right[1];
    criterion.impurity(parent)
        - (nl / n) * criterion.impurity(left)
        - (nr / n) * criterion.impurity(right)
}

/// The entropy of the split itself ("split information", Quinlan 1993).
#[inline]
pub fn split_info(left: [f64; 2], right: [f64; 2]) -> f64 {
    entropy([left[0] + left[1], right[0] + right[1]])
}

/// The number the learner maximises: the gain, or for `gain-ratio` the
/// information gain divided by the split information.
#[inline]
pub fn split_score(criterion: Criterion, parent: [f64; 2], left: [f64; 2], right: [f64; 2]) -> f64 {
    let g = gain(criterion, parent, left, right);
    match criterion {
        Criterion::GainRatio => {
            let si = split_info(left, right);
            if si > 0.0 {
                g / si
            } else {
                0.0
            }
        }
        _ => g,
    }
}
