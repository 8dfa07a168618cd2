//! `burlwatch rules`: a model's tree as one if/then rule per leaf
//! ([`rules::list`]), as text or as the rules' JSON form.

use std::path::PathBuf;

use anyhow::Result;

use burlwatch::model::rules::{self, json::RuleJson};

use super::load_model;

#[derive(clap::Args, Debug)]
pub struct RulesArgs {
    /// The model file.
    #[arg(long)]
    model: PathBuf,
    /// Print the rules as JSON.
    #[arg(long)]
    json: bool,
}

pub fn run(a: RulesArgs) -> Result<i32> {
    let m = load_model(&a.model)?;
    if a.json {
        let rules = rules::list(&m.tree, m.threshold);
        let file: Vec<RuleJson> = rules.iter().map(RuleJson::from).collect();
        out!("{}", serde_json::to_string_pretty(&file)?);
        return Ok(0);
    }
    print(&m)?;
    Ok(0)
}

/// Prints a model's rules as text (also `models show`).
pub(super) fn print(m: &burlwatch::model::Model) -> Result<()> {
    let rules = rules::list(&m.tree, m.threshold);
    let w = m.tree.window();
    out!(
        "model version {}: {} rules over a {}x{} window; pixel (dx,dy) is relative to the centre, +x right, +y down",
        m.model_version,
        rules.len(),
        w.size(),
        w.size()
    );
    out!(
        "a pixel is a detection when its rule's score is at least {:.4}",
        m.threshold
    );
    // Under a symmetry a leaf counts each training pixel once per
    // transform it was also taken under.
    let pixels = match &m.training.symmetry {
        Some(s) => format!("training pixel copies, each pixel once per {s} transform"),
        None => "training pixels".to_string(),
    };
    for (k, r) in rules.iter().enumerate() {
        let conds: Vec<String> = r
            .conditions
            .iter()
            .map(|c| format!("{} is {}", c.offset, if c.set { "set" } else { "clear" }))
            .collect();
        let cond = if conds.is_empty() {
            "always".to_string()
        } else {
            format!("if {}", conds.join(" and "))
        };
        out!(
            "rule {:>4}: {cond}\n           then score {:.4} (from {} background and {} defect {pixels}){}",
            k + 1,
            r.score,
            r.counts[0],
            r.counts[1],
            if r.detects { " => DETECT" } else { "" }
        );
    }
    Ok(())
}
