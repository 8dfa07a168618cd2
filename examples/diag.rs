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
    let s = evaluate::Settings::of(&model);
    let mut per_kind = std::collections::BTreeMap::new();
    for i in 0..n {
        let lf = synth::generate(&p, seed * 1000003 + i as u64);
        let r = evaluate::run(&model.tree, &s, &lf.frame);
        for d in &lf.defects {
            let b = group::BBox {
                x0: d.bbox.0 as u32,
                y0: d.bbox.1 as u32,
                x1: d.bbox.2 as u32,
                y1: d.bbox.3 as u32,
            };
            let best = r.objects.iter().map(|o| o.bbox.iou(&b)).fold(0.0, f64::max);
            let e = per_kind
                .entry(format!("{:?}", d.kind))
                .or_insert((0, 0, Vec::new()));
            e.0 += 1;
            if best >= 0.5 {
                e.1 += 1
            } else {
                e.2.push(((i, d.bbox), best))
            }
        }
        let fp: Vec<_> = r
            .objects
            .iter()
            .filter(|o| {
                lf.defects.iter().all(|d| {
                    let b = group::BBox {
                        x0: d.bbox.0 as u32,
                        y0: d.bbox.1 as u32,
                        x1: d.bbox.2 as u32,
                        y1: d.bbox.3 as u32,
                    };
                    o.bbox.iou(&b) < 0.5
                })
            })
            .collect();
        for o in fp {
            println!(
                "frame {i} FP obj {:?} area {} score {:.3}",
                o.bbox, o.area, o.score
            );
        }
    }
    for (k, v) in per_kind {
        println!("{k}: {}/{} found; misses {:?}", v.1, v.0, v.2);
    }
    if args.len() > 5 {
        let i: usize = args[5].parse().unwrap();
        let lf = synth::generate(&p, seed * 1000003 + i as u64);
        let r = evaluate::run(&model.tree, &s, &lf.frame);
        let (x0, y0): (usize, usize) = (args[6].parse().unwrap(), args[7].parse().unwrap());
        for y in y0..(y0 + 40).min(lf.frame.height()) {
            let mut line = String::new();
            for x in x0..(x0 + 60).min(lf.frame.width()) {
                let (f, m, d) = (lf.frame.get(x, y), lf.mask.get(x, y), r.mask.get(x, y));
                line.push(match (m, d) {
                    (true, true) => 'B',
                    (true, false) => 'M',
                    (false, true) => 'F',
                    _ => {
                        if f {
                            '#'
                        } else {
                            '.'
                        }
                    }
                });
            }
            println!("{line}");
        }
    }
}
