//! The configuration file (TOML): what the offline commands and, later, the
//! daemon read.
//!
//! Two stages. [`RawConfig`] mirrors the file: every key optional, unknown
//! keys rejected (the error names the key and its line), nothing resolved.
//! [`RawConfig::resolve`] then checks values and fills defaults, giving
//! [`Config`] with library types (`DecodeLimits`, `TrainParams`, ...).
//! Command-line options are applied on top of the resolved config by the
//! binary, so the order of precedence is: option, file, built-in default.
//!
//! Relative folder paths in the file are taken relative to the folder the
//! command runs in (the repository root for the example in `config/`).

use std::path::PathBuf;

use serde::Deserialize;

use crate::codec::DecodeLimits;
use crate::error::{Error, ErrorKind, Result};
use crate::learn::{ClassWeight, Criterion, TrainParams};
use crate::window::Window;

/// `[frames]`: how frame files are decoded.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawFrames {
    /// Largest accepted width in pixels (default 8192).
    pub max_width: Option<usize>,
    /// Largest accepted height in pixels (default 8192).
    pub max_height: Option<usize>,
    /// PNG: pixels with 8-bit luma below this are set (default 128).
    pub png_threshold: Option<u8>,
    /// PNG: set the light pixels instead (default false).
    pub png_invert: Option<bool>,
}

/// `[training]`: how models are learned.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawTraining {
    /// Folder of labelled frames a fresh model is trained from.
    pub seed_data: Option<PathBuf>,
    /// Window side: 3, 5, 7, 9 or 11 (default 11).
    pub window: Option<u8>,
    /// "gini", "entropy" or "gain-ratio" (default "entropy").
    pub criterion: Option<String>,
    /// Deepest level of splits (default 48).
    pub max_depth: Option<u32>,
    /// Least weighted pixels on each side of a split (default 1).
    pub min_leaf: Option<f64>,
    /// Least decrease of the tree's weighted impurity per split (default 0).
    pub min_gain: Option<f64>,
    /// "none", "balanced" or "CLEAR:TARGET" (default "balanced").
    pub class_weight: Option<String>,
    /// Share of frames held out to choose pruning and settings (default 0.2).
    pub holdout: Option<f64>,
    /// Grow the final tree again on all frames after tuning (default false).
    pub refit: Option<bool>,
}

/// `[detection]`: overrides of the settings a model carries.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawDetection {
    /// Score a pixel must reach (default: the model's own).
    pub threshold: Option<f64>,
    /// Smallest object kept, in pixels (default: the model's own).
    pub min_area: Option<u32>,
    /// Components this many clear pixels apart merge (default: the model's own).
    pub merge_distance: Option<u32>,
}

/// The file as written.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawConfig {
    #[serde(default)]
    pub frames: RawFrames,
    #[serde(default)]
    pub training: RawTraining,
    #[serde(default)]
    pub detection: RawDetection,
}

/// The resolved configuration.
#[derive(Clone, Debug, PartialEq)]
pub struct Config {
    pub limits: DecodeLimits,
    pub seed_data: Option<PathBuf>,
    pub training: TrainParams,
    pub threshold: Option<f64>,
    pub min_area: Option<u32>,
    pub merge_distance: Option<u32>,
}

impl Default for Config {
    fn default() -> Self {
        RawConfig::default().resolve().expect("defaults are valid")
    }
}

fn invalid(key: &str, msg: impl std::fmt::Display) -> Error {
    Error::new(ErrorKind::Data(format!("{key}: {msg}")))
}

impl RawConfig {
    /// Parses TOML text (no path: the caller attaches it to errors).
    pub fn parse(text: &str) -> Result<RawConfig> {
        toml::from_str(text).map_err(|e| {
            Error::new(ErrorKind::Data(format!(
                "invalid configuration: {}",
                e.to_string().trim_end()
            )))
        })
    }

    /// Checks every value and fills in defaults.
    pub fn resolve(self) -> Result<Config> {
        let d = DecodeLimits::default();
        let f = self.frames;
        let limits = DecodeLimits {
            max_width: f.max_width.unwrap_or(d.max_width),
            max_height: f.max_height.unwrap_or(d.max_height),
            png_threshold: f.png_threshold.unwrap_or(d.png_threshold),
            png_invert: f.png_invert.unwrap_or(d.png_invert),
        };
        if limits.max_width == 0 || limits.max_height == 0 {
            return Err(invalid(
                "frames.max_width / frames.max_height",
                "must be at least 1",
            ));
        }
        let t = self.training;
        let dt = TrainParams::default();
        let window = match t.window {
            None => dt.window,
            Some(s) => Window::new(s).ok_or_else(|| {
                invalid("training.window", format!("{s} is not 3, 5, 7, 9 or 11"))
            })?,
        };
        let criterion = match t.criterion.as_deref() {
            None => dt.criterion,
            Some(c) => Criterion::parse(c).ok_or_else(|| {
                invalid(
                    "training.criterion",
                    format!("{c:?} is not \"gini\", \"entropy\" or \"gain-ratio\""),
                )
            })?,
        };
        let class_weight = match t.class_weight.as_deref() {
            None => dt.class_weight,
            Some(c) => ClassWeight::parse(c).ok_or_else(|| {
                invalid(
                    "training.class_weight",
                    format!("{c:?} is not \"none\", \"balanced\" or \"CLEAR:TARGET\""),
                )
            })?,
        };
        let det = self.detection;
        let training = TrainParams {
            window,
            criterion,
            max_depth: t.max_depth.unwrap_or(dt.max_depth),
            min_leaf: t.min_leaf.unwrap_or(dt.min_leaf),
            min_gain: t.min_gain.unwrap_or(dt.min_gain),
            class_weight,
            holdout: t.holdout.unwrap_or(dt.holdout),
            refit: t.refit.unwrap_or(dt.refit),
            ..dt
        };
        training
            .validate()
            .map_err(|e| invalid("training", e.kind()))?;
        if let Some(th) = det.threshold {
            if !(0.0..=1.0).contains(&th) {
                return Err(invalid(
                    "detection.threshold",
                    format!("{th} is outside [0, 1]"),
                ));
            }
        }
        if det.min_area == Some(0) {
            return Err(invalid("detection.min_area", "must be at least 1"));
        }
        if let Some(m) = det.merge_distance {
            if m > crate::group::MAX_MERGE_DISTANCE {
                return Err(invalid(
                    "detection.merge_distance",
                    format!(
                        "{m} is over the limit of {}",
                        crate::group::MAX_MERGE_DISTANCE
                    ),
                ));
            }
        }
        Ok(Config {
            limits,
            seed_data: t.seed_data,
            training,
            threshold: det.threshold,
            min_area: det.min_area,
            merge_distance: det.merge_distance,
        })
    }
}

/// Parses and resolves configuration text.
pub fn from_str(text: &str) -> Result<Config> {
    RawConfig::parse(text)?.resolve()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn example_file_is_valid() {
        let text = include_str!("../config/treeline.toml");
        let c = from_str(text).expect("config/treeline.toml");
        assert_eq!(
            c.seed_data.as_deref(),
            Some(std::path::Path::new("demo-frames/train"))
        );
    }

    #[test]
    fn unknown_keys_and_bad_values_are_named() {
        let e = from_str("[training]\ndepth = 3\n").unwrap_err().to_string();
        assert!(e.contains("depth") && e.contains("line 2"), "{e}");
        let e = from_str("[frames]\nmax_width = \"wide\"\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("max_width"), "{e}");
        let e = from_str("[training]\ncriterion = \"purity\"\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("training.criterion"), "{e}");
        let e = from_str("[detection]\nthreshold = 2.0\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("detection.threshold"), "{e}");
        let e = from_str("[camera]\n").unwrap_err().to_string();
        assert!(e.contains("camera"), "{e}");
        assert_eq!(from_str("").unwrap(), Config::default());
    }
}
