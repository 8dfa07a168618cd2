//! stub
#[test]
fn explore_float_roundtrip() {
    let mut s = 1u64;
    let mut bad = 0;
    let mut first = None;
    for _ in 0..100000 {
        s = s
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        let a = (s >> 11) as f64 / (1u64 << 53) as f64;
        let t = serde_json::to_string(&a).unwrap();
        let b: f64 = serde_json::from_str(&t).unwrap();
        if a != b {
            bad += 1;
            if first.is_none() {
                first = Some((a, t.clone(), b));
            }
        }
    }
    println!("bad {bad} first {first:?}");
    let mut bad2 = 0;
    let mut ex = None;
    for t in 1..200u64 {
        for c in 1..200u64 {
            let a = t as f64 / (t + c) as f64;
            let b: f64 = serde_json::from_str(&serde_json::to_string(&a).unwrap()).unwrap();
            if a != b {
                bad2 += 1;
                if ex.is_none() {
                    ex = Some((t, c, a, b));
                }
            }
        }
    }
    println!("bad2 {bad2} {ex:?}");
}
