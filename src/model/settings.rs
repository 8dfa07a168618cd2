//! The settings that turn a tree's scores into objects, which every model
//! carries and a user may override: the score threshold and the grouping
//! parameters.
//!
//! [`Overrides`] is the one place where overrides are applied: the command
//! line's options over the configuration's `[detection]` keys over the
//! model's own values ([`Overrides::over`], then [`Overrides::settings_for`]).
//! Every resulting [`Settings`] is validated, so a detector never runs with
//! settings outside their ranges.

use serde::{Deserialize, Serialize};

pub use crate::detect::smooth::Smoothing;
use crate::error::{Error, ErrorKind, Result};

/// Largest accepted merge distance (keeps grouping's look-back bounded).
pub const MAX_MERGE_DISTANCE: u32 = 64;

/// How detections become objects.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct GroupParams {
    /// Objects with fewer pixels are dropped.
    pub min_area: u32,
    /// Components separated by at most this many clear pixels merge.
    pub merge_distance: u32,
}

impl Default for GroupParams {
    fn default() -> Self {
        GroupParams {
            min_area: 1,
            merge_distance: 0,
        }
    }
}

/// The settings that turn scores into objects.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Settings {
    /// Score a pixel must reach to be a detection, in [0, 1].
    pub threshold: f64,
    pub grouping: GroupParams,
    /// Neighbourhood votes on the mask between the threshold and grouping.
    pub smoothing: Smoothing,
}

impl Settings {
    /// Checks every value's range; the error names the setting.
    pub fn validate(&self) -> Result<()> {
        let bad = |m: String| Err(Error::new(ErrorKind::Settings(m)));
        if !(0.0..=1.0).contains(&self.threshold) {
            return bad(format!("threshold {} is outside [0, 1]", self.threshold));
        }
        if let Some(p) = self.smoothing.problem() {
            return bad(p);
        }
        if self.grouping.min_area == 0 {
            return bad("min_area must be at least 1".into());
        }
        if self.grouping.merge_distance > MAX_MERGE_DISTANCE {
            return bad(format!(
                "merge_distance {} is over the limit of {MAX_MERGE_DISTANCE}",
                self.grouping.merge_distance
            ));
        }
        Ok(())
    }
}

/// Values that replace a model's own settings where they are set.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Overrides {
    pub threshold: Option<f64>,
    pub min_area: Option<u32>,
    pub merge_distance: Option<u32>,
}

impl Overrides {
    /// These overrides on top of `below`: each value set here wins.
    pub fn over(self, below: Overrides) -> Overrides {
        Overrides {
            threshold: self.threshold.or(below.threshold),
            min_area: self.min_area.or(below.min_area),
            merge_distance: self.merge_distance.or(below.merge_distance),
        }
    }

    /// The settings in force for a model whose own settings are `own`:
    /// each override replaces the model's value; the result is validated.
    pub fn settings_for(&self, own: Settings) -> Result<Settings> {
        let s = Settings {
            threshold: self.threshold.unwrap_or(own.threshold),
            grouping: GroupParams {
                min_area: self.min_area.unwrap_or(own.grouping.min_area),
                merge_distance: self.merge_distance.unwrap_or(own.grouping.merge_distance),
            },
            smoothing: own.smoothing,
        };
        s.validate()?;
        Ok(s)
    }
}

/// Precision, recall and F1.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Prf {
    pub precision: f64,
    pub recall: f64,
    pub f1: f64,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn overrides_apply_in_order_and_are_validated() {
        let own = Settings {
            threshold: 0.7,
            grouping: GroupParams {
                min_area: 9,
                merge_distance: 2,
            },
            smoothing: Smoothing::OFF,
        };
        let cli = Overrides {
            threshold: Some(0.9),
            ..Overrides::default()
        };
        let file = Overrides {
            threshold: Some(0.1),
            min_area: Some(4),
            merge_distance: None,
        };
        let s = cli.over(file).settings_for(own).unwrap();
        assert_eq!(s.threshold, 0.9);
        assert_eq!(s.grouping.min_area, 4);
        assert_eq!(s.grouping.merge_distance, 2);
        let e = Overrides {
            merge_distance: Some(MAX_MERGE_DISTANCE + 1),
            ..Overrides::default()
        }
        .settings_for(own)
        .unwrap_err();
        assert!(matches!(e.kind(), ErrorKind::Settings(_)));
        assert!(e.to_string().contains("merge_distance 65"), "{e}");
    }
}
