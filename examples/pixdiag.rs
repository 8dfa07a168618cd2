use treeline::*;
fn main() {
    let args: Vec<String> = std::env::args().collect();
    let model = model::Model::from_json(&std::fs::read_to_string(&args[1]).unwrap()).unwrap();
    let p = match args[2].as_str() {
        "alternate" => synth::LoomParams::alternate(),
        _ => synth::LoomParams::standard(),
    };
    let seed: u64 = args[3].parse().unwrap();
    let n: usize = args[4].parse().unwrap();
    let thr: f64 = args
        .get(5)
        .map(|s| s.parse().unwrap())
        .unwrap_or(model.threshold);
    let mut kind_tp = std::collections::BTreeMap::new();
    let (mut fp_border, mut fp_near, mut fp_far) = (0, 0, 0);
    for i in 0..n {
        let lf = synth::generate(&p, seed * 1000003 + i as u64);
        let det = evaluate::detect(&model.tree, thr, &lf.frame);
        for d in &lf.defects {
            let e = kind_tp
                .entry(format!("{:?}", d.kind))
                .or_insert((0u64, 0u64));
            for y in d.bbox.1..=d.bbox.3 {
                for x in d.bbox.0..=d.bbox.2 {
                    if lf.mask.get(x, y) {
                        e.0 += 1;
                        if det.get(x, y) {
                            e.1 += 1;
                        }
                    }
                }
            }
        }
        for (x, y) in det.iter_set() {
            if lf.mask.get(x, y) {
                continue;
            }
            let (w, h) = (lf.frame.width(), lf.frame.height());
            if x < 5 || y < 5 || x + 5 >= w || y + 5 >= h {
                fp_border += 1;
                continue;
            }
            let near = lf.defects.iter().any(|d| {
                x + 4 >= d.bbox.0 && x <= d.bbox.2 + 4 && y + 4 >= d.bbox.1 && y <= d.bbox.3 + 4
            });
            if near {
                fp_near += 1
            } else {
                fp_far += 1
            }
        }
    }
    for (k, (t, hit)) in kind_tp {
        println!("{k}: recall {:.3} of {t}", hit as f64 / t as f64);
    }
    println!("FP border {fp_border} near-defect {fp_near} elsewhere {fp_far}");
}
