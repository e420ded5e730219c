//! The SPICE text itself: unique element names, numbered nodes, comments, `.SUBCKT` / `.ENDS`.

use std::collections::HashSet;

/// Pin 1 and pin 2 of every subcircuit; internal nodes are numbered from 3. Numbers rather than names
/// keep the netlist readable by the oldest SPICE dialects too.
pub(crate) const PIN_A: u32 = 1;
pub(crate) const PIN_B: u32 = 2;

pub(crate) struct Netlist {
    comments: Vec<String>,
    elements: Vec<String>,
    values: Vec<(char, f64)>,
    names: HashSet<String>,
    next_node: u32,
}

impl Netlist {
    pub(crate) fn new() -> Self {
        Netlist {
            comments: Vec::new(),
            elements: Vec::new(),
            values: Vec::new(),
            names: HashSet::new(),
            next_node: 3,
        }
    }

    pub(crate) fn node(&mut self) -> u32 {
        let n = self.next_node;
        self.next_node += 1;
        n
    }

    pub(crate) fn comment(&mut self, line: impl Into<String>) {
        self.comments.push(line.into());
    }

    /// Adds element `name` (its first letter is the SPICE element type: R, L or C) between two nodes.
    pub(crate) fn element(&mut self, name: &str, a: u32, b: u32, value: f64) {
        let kind = name.chars().next().map(|c| c.to_ascii_uppercase());
        assert!(
            matches!(kind, Some('R' | 'L' | 'C')),
            "only R, L and C elements: {name}"
        );
        assert!(
            value.is_finite() && value > 0.0,
            "element {name} has value {value}"
        );
        assert!(
            self.names.insert(name.to_ascii_uppercase()),
            "duplicate element name {name}"
        );
        self.elements.push(format!("{name} {a} {b} {value:e}"));
        self.values.push((kind.unwrap_or('R'), value));
    }

    /// The smallest |impedance| of any single element at `frequency_hz`: with the largest |Z| it sets
    /// how many digits a nodal solve loses (see `export::stated_bound`).
    pub(crate) fn min_element_impedance(&self, frequency_hz: f64) -> f64 {
        let w = 2.0 * std::f64::consts::PI * frequency_hz;
        self.values
            .iter()
            .map(|&(kind, v)| match kind {
                'L' => w * v,
                'C' => 1.0 / (w * v),
                _ => v,
            })
            .fold(f64::INFINITY, f64::min)
    }

    pub(crate) fn render(&self, subckt: &str) -> String {
        let mut out = String::new();
        for c in &self.comments {
            if c.is_empty() {
                out.push_str("*\n");
            } else {
                out.push_str("* ");
                out.push_str(c);
                out.push('\n');
            }
        }
        out.push_str(&format!(".SUBCKT {subckt} {PIN_A} {PIN_B}\n"));
        for e in &self.elements {
            out.push_str(e);
            out.push('\n');
        }
        out.push_str(&format!(".ENDS {subckt}\n"));
        out
    }
}

/// A subcircuit name from the part number: letters, digits and `_` only, never starting with a digit.
pub(crate) fn subckt_name(part_number: Option<&str>) -> String {
    let raw = part_number.unwrap_or("").trim();
    let mut name: String = raw
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '_' {
                c.to_ascii_uppercase()
            } else {
                '_'
            }
        })
        .collect();
    if name.is_empty() {
        name = "MODEL".to_string();
    }
    format!("HB_{name}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn part_numbers_become_safe_subcircuit_names() {
        assert_eq!(subckt_name(Some("lq-22/10 µ")), "HB_LQ_22_10__");
        assert_eq!(subckt_name(None), "HB_MODEL");
    }

    #[test]
    #[should_panic(expected = "duplicate element name")]
    fn duplicate_names_are_a_bug() {
        let mut n = Netlist::new();
        n.element("R1", 1, 2, 1.0);
        n.element("r1", 1, 2, 1.0);
    }
}
