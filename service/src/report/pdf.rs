//! A small PDF writer for the report: A4 pages of text, lines and filled boxes in the standard fonts
//! (Helvetica, Helvetica-Bold, and Symbol for Ω, σ and other Greek letters), which every PDF reader
//! has, so nothing is embedded. Written by hand after the PDF 1.4 reference (Adobe, 2001) from
//! memory: a catalog, a page tree, one content stream per page, a cross-reference table with each
//! object's byte offset, a trailer. Content streams are not compressed (a report is ~100 kB).

use super::chart::{self, Anchor, Prim};
use super::{Block, Tone};

const PAGE_W: f64 = 595.28;
const PAGE_H: f64 = 841.89;
const MARGIN: f64 = 42.0;
const BOTTOM: f64 = 50.0;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Font {
    Regular,
    Bold,
    Symbol,
}

impl Font {
    fn name(self) -> &'static str {
        match self {
            Font::Regular => "F1",
            Font::Bold => "F2",
            Font::Symbol => "F3",
        }
    }
}

/// Helvetica advance widths (1/1000 em) of the printable ASCII characters 32..=126, from Adobe's
/// Helvetica metrics (from memory; used only to place and wrap text).
const HELVETICA: [u16; 95] = [
    278, 278, 355, 556, 556, 889, 667, 191, 333, 333, 389, 584, 278, 333, 278, 278, 556, 556, 556,
    556, 556, 556, 556, 556, 556, 556, 278, 278, 584, 584, 584, 556, 1015, 667, 667, 722, 722, 667,
    611, 778, 722, 278, 500, 667, 556, 833, 722, 778, 667, 778, 722, 667, 611, 722, 667, 944, 667,
    667, 611, 278, 278, 278, 469, 556, 333, 556, 556, 500, 556, 556, 278, 556, 556, 222, 222, 500,
    222, 833, 556, 556, 556, 556, 333, 500, 278, 556, 500, 722, 500, 500, 500, 334, 260, 334, 584,
];

/// A character as (font, byte): WinAnsiEncoding for Latin text, the Symbol font for Greek letters
/// and a few signs WinAnsi lacks; anything else becomes `?`.
fn encode(c: char, bold: bool) -> (Font, u8) {
    let latin = if bold { Font::Bold } else { Font::Regular };
    let symbol = |b: u8| (Font::Symbol, b);
    match c {
        ' '..='~' => (latin, c as u8),
        '\u{a0}'..='\u{ff}' => (latin, c as u32 as u8),
        '€' => (latin, 0x80),
        '…' => (latin, 0x85),
        '‘' => (latin, 0x91),
        '’' => (latin, 0x92),
        '“' => (latin, 0x93),
        '”' => (latin, 0x94),
        '•' => (latin, 0x95),
        '–' => (latin, 0x96),
        '—' => (latin, 0x97),
        '−' => (latin, b'-'),
        'Ω' => symbol(0x57),
        'σ' => symbol(0x73),
        'α' => symbol(0x61),
        'β' => symbol(0x62),
        'ζ' => symbol(0x7a),
        'Δ' => symbol(0x44),
        'ω' => symbol(0x77),
        'μ' => (latin, 0xb5),
        '√' => symbol(0xd6),
        '≤' => symbol(0xa3),
        '≥' => symbol(0xb3),
        '→' => symbol(0xae),
        _ => (latin, b'?'),
    }
}

fn char_width(c: char) -> f64 {
    match encode(c, false) {
        (Font::Symbol, _) => 600.0,
        (_, b) if (32..=126).contains(&b) => HELVETICA[(b - 32) as usize] as f64,
        _ => 556.0,
    }
}

/// Width of `text` in points at `size` (regular weight).
pub fn text_width(text: &str, size: f64) -> f64 {
    text.chars().map(char_width).sum::<f64>() * size / 1000.0
}

fn bold_width(text: &str, size: f64) -> f64 {
    text_width(text, size) * 1.06
}

/// Lines of at most `width` points; words longer than a line are broken.
fn wrap(text: &str, size: f64, width: f64) -> Vec<String> {
    let mut lines = Vec::new();
    for para in text.split('\n') {
        let mut line = String::new();
        for word in para.split(' ') {
            let candidate = if line.is_empty() {
                word.to_string()
            } else {
                format!("{line} {word}")
            };
            if text_width(&candidate, size) <= width {
                line = candidate;
                continue;
            }
            if !line.is_empty() {
                lines.push(std::mem::take(&mut line));
            }
            let mut piece = String::new();
            for c in word.chars() {
                piece.push(c);
                if text_width(&piece, size) > width {
                    piece.pop();
                    lines.push(std::mem::take(&mut piece));
                    piece.push(c);
                }
            }
            line = piece;
        }
        lines.push(line);
    }
    lines
}

fn rgb(hex: &str) -> (f64, f64, f64) {
    let v = u32::from_str_radix(hex.trim_start_matches('#'), 16).unwrap_or(0);
    (
        ((v >> 16) & 0xff) as f64 / 255.0,
        ((v >> 8) & 0xff) as f64 / 255.0,
        (v & 0xff) as f64 / 255.0,
    )
}

fn tone_colour(t: Tone) -> &'static str {
    match t {
        Tone::Plain => "#1f2a37",
        Tone::Good => "#1e7a46",
        Tone::Bad => "#b3261e",
        Tone::Warn => "#9a6700",
    }
}

const INK: &str = "#1f2a37";
const MUTED: &str = "#5b6673";
const LINE: &str = "#c9d1db";

struct Writer {
    pages: Vec<String>,
    ops: String,
    /// The top of the free space on the current page (PDF y, up).
    y: f64,
}

impl Writer {
    fn new() -> Writer {
        Writer {
            pages: Vec::new(),
            ops: String::new(),
            y: PAGE_H - MARGIN,
        }
    }

    fn new_page(&mut self) {
        self.pages.push(std::mem::take(&mut self.ops));
        self.y = PAGE_H - MARGIN;
    }

    /// Makes room for `h` points, starting a page when they do not fit.
    fn need(&mut self, h: f64) {
        if self.y - h < BOTTOM && self.y < PAGE_H - MARGIN - 1.0 {
            self.new_page();
        }
    }

    fn text(&mut self, x: f64, y: f64, size: f64, bold: bool, colour: &str, text: &str) {
        let (r, g, b) = rgb(colour);
        self.ops
            .push_str(&format!("BT {r:.3} {g:.3} {b:.3} rg {x:.2} {y:.2} Td "));
        let mut current: Option<Font> = None;
        let mut buf = String::new();
        let flush = |ops: &mut String, buf: &mut String| {
            if !buf.is_empty() {
                ops.push_str(&format!("({buf}) Tj "));
                buf.clear();
            }
        };
        for c in text.chars() {
            let (font, byte) = encode(c, bold);
            if current != Some(font) {
                flush(&mut self.ops, &mut buf);
                self.ops
                    .push_str(&format!("/{} {size:.2} Tf ", font.name()));
                current = Some(font);
            }
            match byte {
                b'(' | b')' | b'\\' => {
                    buf.push('\\');
                    buf.push(byte as char);
                }
                32..=126 => buf.push(byte as char),
                _ => buf.push_str(&format!("\\{byte:03o}")),
            }
        }
        flush(&mut self.ops, &mut buf);
        self.ops.push_str("ET\n");
    }

    fn line(&mut self, a: (f64, f64), b: (f64, f64), colour: &str, width: f64) {
        let (r, g, bl) = rgb(colour);
        self.ops.push_str(&format!(
            "{r:.3} {g:.3} {bl:.3} RG {width:.2} w {:.2} {:.2} m {:.2} {:.2} l S\n",
            a.0, a.1, b.0, b.1
        ));
    }

    fn fill_rect(&mut self, x: f64, y: f64, w: f64, h: f64, colour: &str) {
        let (r, g, b) = rgb(colour);
        self.ops.push_str(&format!(
            "{r:.3} {g:.3} {b:.3} rg {x:.2} {y:.2} {w:.2} {h:.2} re f\n"
        ));
    }

    fn paragraph(&mut self, text: &str, size: f64, colour: &str) {
        for l in wrap(text, size, PAGE_W - 2.0 * MARGIN) {
            self.need(size * 1.4);
            self.y -= size * 1.4;
            self.text(MARGIN, self.y + size * 0.3, size, false, colour, &l);
        }
        self.y -= 4.0;
    }

    fn chart(&mut self, c: &chart::Chart) {
        let (w, h) = (PAGE_W - 2.0 * MARGIN, 215.0);
        self.need(h + 6.0);
        let (ox, oy) = (MARGIN, self.y);
        let map = |p: (f64, f64)| (ox + p.0, oy - p.1);
        for p in chart::layout(c, w, h) {
            match p {
                Prim::Line {
                    from,
                    to,
                    colour,
                    width,
                } => self.line(map(from), map(to), colour, width),
                Prim::Poly {
                    points,
                    colour,
                    width,
                    dashed,
                } => {
                    let (r, g, b) = rgb(colour);
                    let mut s = format!(
                        "{r:.3} {g:.3} {b:.3} RG {width:.2} w 1 j {} ",
                        if dashed { "[4 3] 0 d" } else { "[] 0 d" }
                    );
                    for (i, &pt) in points.iter().enumerate() {
                        let (x, y) = map(pt);
                        s.push_str(&format!(
                            "{x:.2} {y:.2} {} ",
                            if i == 0 { "m" } else { "l" }
                        ));
                    }
                    s.push_str("S [] 0 d\n");
                    self.ops.push_str(&s);
                }
                Prim::Text {
                    at,
                    size,
                    anchor,
                    text,
                    colour,
                } => {
                    let tw = text_width(&text, size);
                    let x = match anchor {
                        Anchor::Start => at.0,
                        Anchor::Middle => at.0 - tw / 2.0,
                        Anchor::End => at.0 - tw,
                    };
                    let (x, y) = map((x, at.1));
                    self.text(x, y, size, false, colour, &text);
                }
                Prim::Clip([x, y, cw, ch]) => {
                    let (x0, y0) = map((x, y + ch));
                    self.ops
                        .push_str(&format!("q {x0:.2} {y0:.2} {cw:.2} {ch:.2} re W n\n"));
                }
                Prim::Unclip => self.ops.push_str("Q\n"),
            }
        }
        self.y -= h + 6.0;
    }

    fn table(&mut self, head: &[String], rows: &[Vec<super::Cell>]) {
        let size = 8.5;
        let avail = PAGE_W - 2.0 * MARGIN;
        let n = head.len().max(1);
        // Column widths from the widest text, each at least a share of the page, scaled to fit.
        let mut want: Vec<f64> = (0..n)
            .map(|i| {
                let cells = rows
                    .iter()
                    .filter_map(|r| r.get(i))
                    .map(|c| text_width(&c.text, size));
                cells
                    .chain(std::iter::once(bold_width(&head[i], size)))
                    .fold(0.0, f64::max)
                    + 8.0
            })
            .collect();
        let floor = avail / n as f64 * 0.5;
        for w in &mut want {
            *w = w.clamp(floor.min(*w), avail * 0.6);
        }
        let total: f64 = want.iter().sum();
        let widths: Vec<f64> = want.iter().map(|w| w * avail / total).collect();
        let row_lines = |cells: Vec<(String, bool)>| -> Vec<Vec<String>> {
            cells
                .iter()
                .zip(&widths)
                .map(|((t, _), w)| wrap(t, size, w - 6.0))
                .collect()
        };
        let head_lines = row_lines(head.iter().map(|h| (h.clone(), true)).collect());
        let draw_head = |w: &mut Writer| {
            let lines = head_lines.iter().map(Vec::len).max().unwrap_or(1) as f64;
            let h = lines * size * 1.3 + 4.0;
            w.need(h);
            let mut x = MARGIN;
            for (i, cell) in head_lines.iter().enumerate() {
                for (k, l) in cell.iter().enumerate() {
                    w.text(
                        x + 3.0,
                        w.y - size * 1.1 - k as f64 * size * 1.3,
                        size,
                        true,
                        MUTED,
                        l,
                    );
                }
                x += widths[i];
            }
            w.y -= h;
            w.line((MARGIN, w.y), (MARGIN + avail, w.y), MUTED, 0.6);
        };
        draw_head(self);
        for r in rows {
            let lines = row_lines(r.iter().map(|c| (c.text.clone(), false)).collect());
            let count = lines.iter().map(Vec::len).max().unwrap_or(1) as f64;
            let h = count * size * 1.3 + 4.0;
            if self.y - h < BOTTOM {
                self.new_page();
                draw_head(self);
            }
            let mut x = MARGIN;
            for (i, cell_lines) in lines.iter().enumerate() {
                let c = &r[i];
                for (k, l) in cell_lines.iter().enumerate() {
                    let tx = if c.numeric {
                        x + widths[i] - 3.0 - text_width(l, size)
                    } else {
                        x + 3.0
                    };
                    self.text(
                        tx,
                        self.y - size * 1.1 - k as f64 * size * 1.3,
                        size,
                        c.tone == Tone::Good || c.tone == Tone::Bad,
                        tone_colour(c.tone),
                        l,
                    );
                }
                x += widths[i];
            }
            self.y -= h;
            self.line((MARGIN, self.y), (MARGIN + avail, self.y), LINE, 0.4);
        }
        self.y -= 6.0;
    }

    fn block(&mut self, b: &Block) {
        let avail = PAGE_W - 2.0 * MARGIN;
        match b {
            Block::Title { title, subtitle } => {
                for l in wrap(title, 16.0, avail) {
                    self.y -= 20.0;
                    self.text(MARGIN, self.y, 16.0, true, INK, &l);
                }
                self.y -= 4.0;
                self.paragraph(subtitle, 9.5, MUTED);
            }
            Block::Status(items) => {
                let gap = 8.0;
                let w = (avail - gap * (items.len() as f64 - 1.0)) / items.len().max(1) as f64;
                let wrapped: Vec<Vec<String>> = items
                    .iter()
                    .map(|(_, v, _)| wrap(v, 9.5, w - 14.0))
                    .collect();
                let lines = wrapped.iter().map(Vec::len).max().unwrap_or(1) as f64;
                let h = 18.0 + lines * 12.0 + 4.0;
                self.need(h + 8.0);
                let top = self.y - 4.0;
                for (i, (caption, _, tone)) in items.iter().enumerate() {
                    let x = MARGIN + i as f64 * (w + gap);
                    self.fill_rect(x, top - h, 4.0, h, tone_colour(*tone));
                    self.line((x, top), (x + w, top), LINE, 0.6);
                    self.line((x + w, top), (x + w, top - h), LINE, 0.6);
                    self.line((x, top - h), (x + w, top - h), LINE, 0.6);
                    self.text(x + 9.0, top - 12.0, 7.5, false, MUTED, caption);
                    for (k, l) in wrapped[i].iter().enumerate() {
                        self.text(
                            x + 9.0,
                            top - 25.0 - k as f64 * 12.0,
                            9.5,
                            true,
                            tone_colour(*tone),
                            l,
                        );
                    }
                }
                self.y = top - h - 8.0;
            }
            Block::Heading(t) => {
                self.need(40.0);
                self.y -= 20.0;
                self.text(MARGIN, self.y, 12.0, true, INK, t);
                self.y -= 4.0;
                self.line((MARGIN, self.y), (MARGIN + avail, self.y), LINE, 0.6);
                self.y -= 4.0;
            }
            Block::Para(t) => self.paragraph(t, 9.5, INK),
            Block::Muted(t) => self.paragraph(t, 8.5, MUTED),
            Block::KeyValues(kv) => {
                let kw = avail * 0.3;
                for (k, v) in kv {
                    let lines = wrap(v, 9.0, avail - kw - 6.0);
                    let keys = wrap(k, 9.0, kw - 8.0);
                    let h = lines.len().max(keys.len()) as f64 * 11.5 + 3.0;
                    self.need(h);
                    for (i, l) in keys.iter().enumerate() {
                        self.text(
                            MARGIN,
                            self.y - 10.0 - i as f64 * 11.5,
                            9.0,
                            false,
                            MUTED,
                            l,
                        );
                    }
                    for (i, l) in lines.iter().enumerate() {
                        self.text(
                            MARGIN + kw,
                            self.y - 10.0 - i as f64 * 11.5,
                            9.0,
                            false,
                            INK,
                            l,
                        );
                    }
                    self.y -= h;
                }
                self.y -= 4.0;
            }
            Block::Table { head, rows } => self.table(head, rows),
            Block::Chart(c) => self.chart(c),
            Block::PageBreak => {
                if self.y < PAGE_H - MARGIN - 1.0 {
                    self.new_page();
                }
            }
            Block::Signatures(who) => {
                self.need(50.0);
                self.y -= 40.0;
                let w = (avail - 30.0) / who.len().max(1) as f64;
                for (i, name) in who.iter().enumerate() {
                    let x = MARGIN + i as f64 * (w + 30.0);
                    self.line((x, self.y), (x + w, self.y), INK, 0.6);
                    self.text(
                        x,
                        self.y - 10.0,
                        8.0,
                        false,
                        MUTED,
                        &format!("{name}: name, date, signature"),
                    );
                }
                self.y -= 18.0;
            }
        }
    }
}

/// The report as PDF bytes: A4 pages, a footer with `footer` and the page number on each.
pub fn render(blocks: &[Block], title: &str, footer: &str) -> Vec<u8> {
    let mut w = Writer::new();
    for b in blocks {
        w.block(b);
    }
    w.new_page();
    let pages: Vec<String> = w.pages.into_iter().filter(|p| !p.is_empty()).collect();
    let count = pages.len();
    let mut contents = Vec::with_capacity(count);
    for (i, ops) in pages.into_iter().enumerate() {
        let mut f = Writer::new();
        f.ops = ops;
        f.line((MARGIN, 34.0), (PAGE_W - MARGIN, 34.0), LINE, 0.5);
        f.text(MARGIN, 24.0, 7.5, false, MUTED, footer);
        let n = format!("page {} of {count}", i + 1);
        f.text(
            PAGE_W - MARGIN - text_width(&n, 7.5),
            24.0,
            7.5,
            false,
            MUTED,
            &n,
        );
        contents.push(f.ops);
    }
    assemble(&contents, title)
}

/// A PDF string literal of any text (the document title in the Info dictionary).
fn literal(text: &str) -> String {
    let mut s = String::from("(");
    for c in text.chars() {
        let (_, b) = encode(c, false);
        match b {
            b'(' | b')' | b'\\' => {
                s.push('\\');
                s.push(b as char);
            }
            32..=126 => s.push(b as char),
            _ => s.push_str(&format!("\\{b:03o}")),
        }
    }
    s.push(')');
    s
}

/// Objects: 1 catalog, 2 page tree, 3–5 fonts, 6 info, then a page and its content per page.
fn assemble(contents: &[String], title: &str) -> Vec<u8> {
    let n = contents.len();
    let mut objects: Vec<Vec<u8>> = Vec::new();
    objects.push(b"<< /Type /Catalog /Pages 2 0 R >>".to_vec());
    let kids: Vec<String> = (0..n).map(|i| format!("{} 0 R", 7 + 2 * i)).collect();
    objects.push(
        format!(
            "<< /Type /Pages /Kids [{}] /Count {n} /MediaBox [0 0 {PAGE_W} {PAGE_H}] >>",
            kids.join(" ")
        )
        .into_bytes(),
    );
    objects.push(
        b"<< /Type /Font /Subtype /Type1 /BaseFont /Helvetica /Encoding /WinAnsiEncoding >>"
            .to_vec(),
    );
    objects.push(
        b"<< /Type /Font /Subtype /Type1 /BaseFont /Helvetica-Bold /Encoding /WinAnsiEncoding >>"
            .to_vec(),
    );
    objects.push(b"<< /Type /Font /Subtype /Type1 /BaseFont /Symbol >>".to_vec());
    objects.push(format!("<< /Title {} /Producer (henrybook) >>", literal(title)).into_bytes());
    for (i, c) in contents.iter().enumerate() {
        objects.push(
            format!(
                "<< /Type /Page /Parent 2 0 R /Resources << /Font << /F1 3 0 R /F2 4 0 R /F3 5 0 R >> >> \
                 /Contents {} 0 R >>",
                8 + 2 * i
            )
            .into_bytes(),
        );
        let mut stream = format!("<< /Length {} >>\nstream\n", c.len()).into_bytes();
        stream.extend_from_slice(c.as_bytes());
        stream.extend_from_slice(b"\nendstream");
        objects.push(stream);
    }
    let mut out: Vec<u8> = b"%PDF-1.4\n%\xe2\xe3\xcf\xd3\n".to_vec();
    let mut offsets = Vec::with_capacity(objects.len());
    for (i, body) in objects.iter().enumerate() {
        offsets.push(out.len());
        out.extend_from_slice(format!("{} 0 obj\n", i + 1).as_bytes());
        out.extend_from_slice(body);
        out.extend_from_slice(b"\nendobj\n");
    }
    let xref = out.len();
    out.extend_from_slice(
        format!("xref\n0 {}\n0000000000 65535 f \n", objects.len() + 1).as_bytes(),
    );
    for o in offsets {
        out.extend_from_slice(format!("{o:010} 00000 n \n").as_bytes());
    }
    out.extend_from_slice(
        format!(
            "trailer\n<< /Size {} /Root 1 0 R /Info 6 0 R >>\nstartxref\n{xref}\n%%EOF\n",
            objects.len() + 1
        )
        .as_bytes(),
    );
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::report::{build, tests::input};

    fn find(hay: &[u8], needle: &[u8]) -> Option<usize> {
        hay.windows(needle.len()).position(|w| w == needle)
    }

    #[test]
    fn every_cross_reference_points_at_its_object() {
        let pdf = render(&build(&input()), "t", "footer");
        assert!(pdf.starts_with(b"%PDF-1.4"));
        assert!(pdf.ends_with(b"%%EOF\n"));
        let text = String::from_utf8_lossy(&pdf);
        let start: usize = text
            .rsplit("startxref\n")
            .next()
            .unwrap()
            .lines()
            .next()
            .unwrap()
            .parse()
            .unwrap();
        assert_eq!(&pdf[start..start + 4], b"xref");
        let table = std::str::from_utf8(&pdf[start..]).unwrap();
        let count: usize = table
            .lines()
            .nth(1)
            .unwrap()
            .split(' ')
            .nth(1)
            .unwrap()
            .parse()
            .unwrap();
        for (i, line) in table.lines().skip(3).take(count - 1).enumerate() {
            let off: usize = line[..10].parse().unwrap();
            let head = format!("{} 0 obj", i + 1);
            assert_eq!(
                &pdf[off..off + head.len()],
                head.as_bytes(),
                "object {}",
                i + 1
            );
        }
    }

    #[test]
    fn each_stream_length_is_its_byte_count() {
        let pdf = render(&build(&input()), "t", "f");
        let mut at = 0;
        let mut streams = 0;
        while let Some(p) = find(&pdf[at..], b"/Length ") {
            let p = at + p + 8;
            let end = p + find(&pdf[p..], b" ").unwrap();
            let len: usize = std::str::from_utf8(&pdf[p..end]).unwrap().parse().unwrap();
            let body = p + find(&pdf[p..], b"stream\n").unwrap() + 7;
            assert_eq!(&pdf[body + len..body + len + 10], b"\nendstream");
            streams += 1;
            at = body + len;
        }
        assert!(streams >= 2, "the report has two pages or more: {streams}");
    }

    #[test]
    fn greek_letters_use_the_symbol_font_and_micro_is_latin() {
        assert_eq!(encode('σ', false), (Font::Symbol, b's'));
        assert_eq!(encode('Ω', true), (Font::Symbol, b'W'));
        assert_eq!(encode('µ', false), (Font::Regular, 0xb5));
        assert_eq!(encode('±', true), (Font::Bold, 0xb1));
        let mut w = Writer::new();
        w.text(0.0, 0.0, 9.0, false, INK, "9 µH (2 σ)");
        assert!(
            w.ops
                .contains("(9 \\265H \\(2 ) Tj /F3 9.00 Tf (s) Tj /F1 9.00 Tf (\\)) Tj"),
            "{}",
            w.ops
        );
    }

    #[test]
    fn long_words_and_lines_wrap_inside_the_width() {
        let lines = wrap(&"ab".repeat(64), 9.0, 100.0);
        assert!(lines.len() > 1);
        assert!(lines.iter().all(|l| text_width(l, 9.0) <= 100.0));
        // Helvetica "Hello" = 722 + 556 + 222 + 222 + 556 = 2278/1000 em.
        assert!((text_width("Hello", 10.0) - 22.78).abs() < 1e-9);
    }
}
