//! Which lumped candidate contains which, read from their labels (`l0+rdc+cp+rp+ls+1s+1p`,
//! `l0+rdc+cp+k_ac+ls+resonance_relaxation+air`), written from the model's own definitions rather than
//! from the fitter's code: a larger candidate has every element of the smaller one, or an element that
//! becomes it as one parameter goes to its limit.
//!
//! - rp, k_ac, ls: present in the larger one too (absent = rp → ∞, k_ac → 0, ls → 0);
//! - sections: the same ones, or none in the smaller;
//! - the core (m(f) in model/mod.rs): no core loss ⊂ a single pole (rp) ⊂ Cole–Cole (α → 0) ⊂
//!   Havriliak–Negami (1 − β → 0); Cole–Cole ⊂ resonance plus relaxation (resonant share → 0); no air
//!   path ⊂ an air path (share → 0). The resonance law contains a single pole only approximately, so
//!   nothing but itself.

/// (rp, k_ac, ls, series sections, parallel sections, core law, air path).
pub struct Elements {
    pub rp: bool,
    pub k_ac: bool,
    pub ls: bool,
    pub series: usize,
    pub parallel: usize,
    pub law: Option<String>,
    pub air: bool,
}

pub fn elements(label: &str) -> Elements {
    let mut e = Elements {
        rp: false,
        k_ac: false,
        ls: false,
        series: 0,
        parallel: 0,
        law: None,
        air: false,
    };
    for part in label.split('+') {
        let count = |suffix: char| {
            part.strip_suffix(suffix)
                .and_then(|n| n.parse::<usize>().ok())
        };
        match part {
            "rp" => e.rp = true,
            "k_ac" => e.k_ac = true,
            "ls" => e.ls = true,
            "air" => e.air = true,
            "l0" | "rdc" | "cp" => {}
            _ if count('s').is_some() => e.series = count('s').unwrap(),
            _ if count('p').is_some() => e.parallel = count('p').unwrap(),
            law => e.law = Some(law.to_string()),
        }
    }
    e
}

fn core_contains(large: &Elements, small: &Elements) -> bool {
    let relaxing = |l: &str| matches!(l, "cole_cole" | "havriliak_negami" | "resonance_relaxation");
    (!small.air || large.air)
        && match (small.law.as_deref(), large.law.as_deref()) {
            (None, None) => !small.rp || large.rp,
            (None, Some(l)) => small.rp && relaxing(l),
            (Some(a), Some(b)) => {
                a == b
                    || (a == "cole_cole"
                        && matches!(b, "havriliak_negami" | "resonance_relaxation"))
            }
            (Some(_), None) => false,
        }
}

/// Whether candidate `large` contains candidate `small` (sections: the same counts, or none in the
/// smaller; labels give counts, not order, and these two cases need no order).
pub fn contains(large: &str, small: &str) -> bool {
    let (a, b) = (elements(small), elements(large));
    small != large
        && core_contains(&b, &a)
        && (!a.k_ac || b.k_ac)
        && (!a.ls || b.ls)
        && ((a.series, a.parallel) == (b.series, b.parallel) || a.series + a.parallel == 0)
}

/// Asserts the nesting rule on a fit's candidates: no candidate ends with a higher cost than one it
/// [`contains`], up to rounding (a millionth of the larger cost or of `floor`, the χ² the stated noise
/// implies: `same_cost`). `what` names the sweep in the failure.
pub fn assert_nested_costs(candidates: &[henrybook::fit::Candidate], floor: f64, what: &str) {
    for small in candidates {
        for large in candidates {
            if contains(&large.label, &small.label) {
                assert!(
                    large.cost <= small.cost
                        || henrybook::fit::lumped::same_cost(large.cost, small.cost, floor),
                    "{what}: {} (cost {}) contains {} (cost {}) but ends higher",
                    large.label,
                    large.cost,
                    small.label,
                    small.cost
                );
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::contains;

    #[test]
    fn the_core_laws_nest_as_the_model_defines_them() {
        let base = "l0+rdc+cp+k_ac+ls";
        assert!(contains(
            &format!("{base}+cole_cole"),
            "l0+rdc+cp+rp+k_ac+ls"
        ));
        assert!(contains(
            &format!("{base}+havriliak_negami+air"),
            &format!("{base}+cole_cole")
        ));
        assert!(contains(
            &format!("{base}+resonance_relaxation"),
            &format!("{base}+cole_cole")
        ));
        assert!(contains(
            &format!("{base}+cole_cole+air"),
            &format!("{base}+cole_cole")
        ));
        assert!(!contains(
            &format!("{base}+cole_cole"),
            &format!("{base}+cole_cole+air")
        ));
        assert!(!contains(
            &format!("{base}+resonance"),
            "l0+rdc+cp+rp+k_ac+ls"
        ));
        assert!(!contains(
            &format!("{base}+resonance_relaxation"),
            &format!("{base}+havriliak_negami")
        ));
        assert!(!contains("l0+rdc+cp+cole_cole", "l0+rdc+cp+k_ac+rp"));
        assert!(contains("l0+rdc+cp+rp+ls+1s", "l0+rdc+cp+rp"));
        assert!(!contains("l0+rdc+cp+rp+ls+1s", "l0+rdc+cp+rp+1p"));
    }
}
