//! An independent modified-nodal-analysis AC solver for the netlists henrybook writes, used only by the
//! tests. It reads the netlist TEXT (R, L, C, `.SUBCKT` / `.ENDS`, SPICE scale suffixes), stamps the
//! complex MNA matrix (node voltages plus one branch current per inductor) and solves it by Gaussian
//! elimination with partial pivoting. It shares no code with the exporter.

use num_complex::Complex64;
use std::collections::{HashMap, HashSet};
use std::f64::consts::PI;

#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Kind {
    R,
    L,
    C,
}

#[derive(Debug, Clone)]
pub struct Element {
    pub name: String,
    pub kind: Kind,
    pub a: String,
    pub b: String,
    pub value: f64,
}

#[derive(Debug, Clone)]
pub struct Subckt {
    pub name: String,
    pub pins: Vec<String>,
    pub elements: Vec<Element>,
    /// Comment lines without the leading `*`.
    pub comments: Vec<String>,
}

/// A SPICE number: mantissa plus optional scale suffix (T G MEG K M U N P F A, MIL); trailing letters
/// after the suffix (units) are ignored, as SPICE does.
pub fn parse_value(token: &str) -> Result<f64, String> {
    let t = token.to_ascii_lowercase();
    let bytes = t.as_bytes();
    let mut end = 0;
    while end < bytes.len() {
        let c = bytes[end];
        let ok = c.is_ascii_digit()
            || c == b'.'
            || ((c == b'+' || c == b'-') && (end == 0 || bytes[end - 1] == b'e'))
            || (c == b'e'
                && end > 0
                && bytes
                    .get(end + 1)
                    .is_some_and(|n| n.is_ascii_digit() || *n == b'-' || *n == b'+'));
        if !ok {
            break;
        }
        end += 1;
    }
    let mantissa: f64 = t[..end]
        .parse()
        .map_err(|_| format!("not a number: {token:?}"))?;
    let rest = &t[end..];
    let scale = if rest.starts_with("meg") {
        1e6
    } else if rest.starts_with("mil") {
        25.4e-6
    } else {
        match rest.chars().next() {
            None => 1.0,
            Some('t') => 1e12,
            Some('g') => 1e9,
            Some('k') => 1e3,
            Some('m') => 1e-3,
            Some('u') => 1e-6,
            Some('n') => 1e-9,
            Some('p') => 1e-12,
            Some('f') => 1e-15,
            Some('a') => 1e-18,
            Some(c) if c.is_ascii_alphabetic() => 1.0,
            Some(_) => return Err(format!("bad number {token:?}")),
        }
    };
    Ok(mantissa * scale)
}

/// Parses the first (and only) subcircuit of `text`. Anything other than comments, R/L/C elements and
/// the `.SUBCKT`/`.ENDS` pair is an error, as are duplicate element names.
pub fn parse(text: &str) -> Result<Subckt, String> {
    let mut lines: Vec<(usize, String)> = Vec::new();
    for (i, raw) in text.lines().enumerate() {
        let line = raw.split(';').next().unwrap_or("").trim().to_string();
        if let Some(cont) = line.strip_prefix('+') {
            let last = lines
                .last_mut()
                .ok_or(format!("line {}: continuation first", i + 1))?;
            last.1.push(' ');
            last.1.push_str(cont);
        } else {
            lines.push((i + 1, line));
        }
    }
    let mut sub: Option<Subckt> = None;
    let mut comments = Vec::new();
    let mut ended = false;
    let mut names = HashSet::new();
    for (no, line) in lines {
        if line.is_empty() {
            continue;
        }
        if let Some(c) = line.strip_prefix('*') {
            comments.push(c.trim().to_string());
            continue;
        }
        let tokens: Vec<&str> = line.split_whitespace().collect();
        let head = tokens[0].to_ascii_uppercase();
        if head == ".SUBCKT" {
            if sub.is_some() {
                return Err(format!("line {no}: second .SUBCKT"));
            }
            if tokens.len() < 3 {
                return Err(format!("line {no}: .SUBCKT without pins"));
            }
            sub = Some(Subckt {
                name: tokens[1].to_string(),
                pins: tokens[2..].iter().map(|s| s.to_string()).collect(),
                elements: Vec::new(),
                comments: Vec::new(),
            });
            continue;
        }
        if head == ".ENDS" {
            ended = true;
            continue;
        }
        let s = sub
            .as_mut()
            .ok_or(format!("line {no}: element outside .SUBCKT"))?;
        if ended {
            return Err(format!("line {no}: element after .ENDS"));
        }
        let kind = match head.chars().next() {
            Some('R') => Kind::R,
            Some('L') => Kind::L,
            Some('C') => Kind::C,
            _ => return Err(format!("line {no}: element {} is not R, L or C", tokens[0])),
        };
        if tokens.len() != 4 {
            return Err(format!("line {no}: expected `name n1 n2 value`: {line}"));
        }
        if !names.insert(head.clone()) {
            return Err(format!("line {no}: duplicate element name {}", tokens[0]));
        }
        let value = parse_value(tokens[3]).map_err(|e| format!("line {no}: {e}"))?;
        s.elements.push(Element {
            name: tokens[0].to_string(),
            kind,
            a: tokens[1].to_string(),
            b: tokens[2].to_string(),
            value,
        });
    }
    let mut s = sub.ok_or("no .SUBCKT")?;
    if !ended {
        return Err("no .ENDS".to_string());
    }
    s.comments = comments;
    Ok(s)
}

/// Impedance between the subcircuit's first and second pin at `frequency_hz`: 1 A injected into pin 1,
/// pin 2 grounded, Z = V(pin 1).
pub fn impedance(s: &Subckt, frequency_hz: f64) -> Complex64 {
    assert_eq!(s.pins.len(), 2, "a two-pin subcircuit");
    let ground = &s.pins[1];
    let mut index: HashMap<&str, usize> = HashMap::new();
    for e in &s.elements {
        for n in [&e.a, &e.b] {
            if n != ground {
                let next = index.len();
                index.entry(n.as_str()).or_insert(next);
            }
        }
    }
    let nodes = index.len();
    let inductors: Vec<&Element> = s.elements.iter().filter(|e| e.kind == Kind::L).collect();
    let size = nodes + inductors.len();
    let mut m = vec![vec![Complex64::new(0.0, 0.0); size]; size];
    let mut rhs = vec![Complex64::new(0.0, 0.0); size];
    let w = 2.0 * PI * frequency_hz;
    let idx = |n: &str| index.get(n).copied();
    for e in &s.elements {
        let y = match e.kind {
            Kind::R => Complex64::new(1.0 / e.value, 0.0),
            Kind::C => Complex64::new(0.0, w * e.value),
            Kind::L => continue,
        };
        let (a, b) = (idx(&e.a), idx(&e.b));
        if let Some(a) = a {
            m[a][a] += y;
        }
        if let Some(b) = b {
            m[b][b] += y;
        }
        if let (Some(a), Some(b)) = (a, b) {
            m[a][b] -= y;
            m[b][a] -= y;
        }
    }
    for (k, e) in inductors.iter().enumerate() {
        let row = nodes + k;
        let one = Complex64::new(1.0, 0.0);
        if let Some(a) = idx(&e.a) {
            m[a][row] += one;
            m[row][a] += one;
        }
        if let Some(b) = idx(&e.b) {
            m[b][row] -= one;
            m[row][b] -= one;
        }
        m[row][row] -= Complex64::new(0.0, w * e.value);
    }
    let pin = idx(&s.pins[0]).expect("pin 1 is connected");
    rhs[pin] = Complex64::new(1.0, 0.0);
    let x = solve(m, rhs);
    x[pin]
}

/// Gaussian elimination with partial pivoting.
pub fn solve(mut m: Vec<Vec<Complex64>>, mut b: Vec<Complex64>) -> Vec<Complex64> {
    let n = b.len();
    for col in 0..n {
        let p = (col..n)
            .max_by(|&i, &j| m[i][col].norm().total_cmp(&m[j][col].norm()))
            .unwrap();
        assert!(m[p][col].norm() > 0.0, "singular MNA matrix");
        m.swap(col, p);
        b.swap(col, p);
        for r in col + 1..n {
            let f = m[r][col] / m[col][col];
            if f.norm() == 0.0 {
                continue;
            }
            let (upper, lower) = m.split_at_mut(r);
            for (dst, src) in lower[0][col..].iter_mut().zip(&upper[col][col..]) {
                *dst -= f * src;
            }
            let v = b[col];
            b[r] -= f * v;
        }
    }
    let mut x = vec![Complex64::new(0.0, 0.0); n];
    for r in (0..n).rev() {
        let mut acc = b[r];
        for c in r + 1..n {
            acc -= m[r][c] * x[c];
        }
        x[r] = acc / m[r][r];
    }
    x
}

/// The number after `key` in the netlist's comments.
pub fn comment_number(s: &Subckt, key: &str) -> Option<f64> {
    s.comments
        .iter()
        .find_map(|c| c.strip_prefix(key))
        .and_then(|v| v.trim().parse().ok())
}

/// `n` log-spaced points from `lo` to `hi`.
pub fn log_points(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    (0..n)
        .map(|i| lo * (hi / lo).powf(i as f64 / (n - 1) as f64))
        .collect()
}

/// `n` log-spaced points plus, around every sign change of Im Z(f), points from 1e-8 to 5 % away on
/// both sides (so the peak of a resonance of any Q is sampled).
pub fn points_with_resonances(
    z: &dyn Fn(f64) -> Complex64,
    lo: f64,
    hi: f64,
    n: usize,
) -> Vec<f64> {
    let mut pts = log_points(lo, hi, n);
    let scan = log_points(lo, hi, 20 * n);
    for w in scan.windows(2) {
        let (mut a, mut b) = (w[0], w[1]);
        if z(a).im.signum() == z(b).im.signum() {
            continue;
        }
        let sa = z(a).im.signum();
        for _ in 0..100 {
            let m = 0.5 * (a + b);
            if z(m).im.signum() == sa {
                a = m;
            } else {
                b = m;
            }
        }
        let fr = 0.5 * (a + b);
        for t in log_points(1e-8, 0.05, 61) {
            for f in [fr * (1.0 + t), fr * (1.0 - t)] {
                if f > lo && f < hi {
                    pts.push(f);
                }
            }
        }
    }
    pts
}
