//! The report as one self-contained HTML page: inline CSS and SVG, no script, no links out. It prints
//! on A4 with the plots on their own page; on screen it reads like the dashboard.

use super::chart::{self, Anchor, Prim};
use super::{Block, Tone};

/// Text as HTML text or attribute value.
pub fn escape(text: &str) -> String {
    let mut s = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => s.push_str("&amp;"),
            '<' => s.push_str("&lt;"),
            '>' => s.push_str("&gt;"),
            '"' => s.push_str("&quot;"),
            '\'' => s.push_str("&#39;"),
            c => s.push(c),
        }
    }
    s
}

fn tone_class(t: Tone) -> &'static str {
    match t {
        Tone::Plain => "",
        Tone::Good => "good",
        Tone::Bad => "bad",
        Tone::Warn => "warn",
    }
}

/// The report's style sheet (inline: the page is self-contained).
pub const STYLE: &str = r#"
:root { --ink: #1f2a37; --muted: #5b6673; --line: #d5dbe3; --good: #1e7a46; --bad: #b3261e; --warn: #9a6700; }
* { box-sizing: border-box; }
body { font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif; color: var(--ink);
  margin: 24px auto; max-width: 980px; padding: 0 16px; background: #fff; }
h1 { font-size: 22px; margin: 0 0 2px; }
h2 { font-size: 16px; margin: 22px 0 8px; padding-bottom: 3px; border-bottom: 1px solid var(--line); }
.subtitle { color: var(--muted); margin: 0 0 14px; }
.status { display: grid; grid-template-columns: repeat(3, 1fr); gap: 10px; margin: 12px 0; }
.status div { border: 1px solid var(--line); border-left-width: 5px; border-radius: 4px; padding: 8px 10px; }
.status .caption { color: var(--muted); font-size: 12px; display: block; }
.status .value { font-weight: 600; }
.status .good { border-left-color: var(--good); } .status .bad { border-left-color: var(--bad); }
.status .warn { border-left-color: var(--warn); }
table { border-collapse: collapse; width: 100%; margin: 4px 0 8px; }
th, td { text-align: left; padding: 4px 8px; border-bottom: 1px solid var(--line); vertical-align: top; }
th { font-weight: 600; color: var(--muted); font-size: 12px; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.kv th { width: 30%; font-size: 13px; color: var(--ink); font-weight: 500; }
table.kv td { word-break: break-all; }
td.good { color: var(--good); font-weight: 600; } td.bad { color: var(--bad); font-weight: 600; }
td.warn { color: var(--warn); }
.muted { color: var(--muted); font-size: 13px; }
figure { margin: 10px 0 16px; break-inside: avoid; }
svg.chart { width: 100%; height: auto; display: block; }
.signatures { display: grid; grid-template-columns: 1fr 1fr; gap: 28px; margin-top: 26px; }
.signatures div { border-top: 1px solid var(--ink); padding-top: 4px; color: var(--muted); font-size: 12px; }
.page-break { break-before: page; page-break-before: always; }
@page { size: A4; margin: 14mm 12mm; }
@media print {
  body { margin: 0; max-width: none; padding: 0; font-size: 11.5px; }
  h2 { break-after: avoid; page-break-after: avoid; }
  table, tr, .status { break-inside: avoid; page-break-inside: avoid; }
  .screen-only { display: none; }
}
"#;

/// Standard base64 with padding (RFC 4648, section 4).
fn base64(bytes: &[u8]) -> String {
    const ALPHABET: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut out = String::with_capacity(bytes.len().div_ceil(3) * 4);
    for chunk in bytes.chunks(3) {
        let b = [
            chunk[0],
            *chunk.get(1).unwrap_or(&0),
            *chunk.get(2).unwrap_or(&0),
        ];
        let n = (u32::from(b[0]) << 16) | (u32::from(b[1]) << 8) | u32::from(b[2]);
        for k in 0..4 {
            if k <= chunk.len() {
                out.push(ALPHABET[((n >> (18 - 6 * k)) & 63) as usize] as char);
            } else {
                out.push('=');
            }
        }
    }
    out
}

/// The Content-Security-Policy source that admits exactly the report's style sheet. The dashboard
/// shows a report in a tab of its own origin (a `blob:` document inherits the dashboard's policy),
/// where `style-src 'self'` alone would drop the report's inline style.
pub fn style_source() -> String {
    use sha2::{Digest, Sha256};
    format!("'sha256-{}'", base64(&Sha256::digest(STYLE.as_bytes())))
}

/// Draws the chart as an inline SVG.
pub fn svg(c: &chart::Chart, width: f64, height: f64) -> String {
    let mut s = format!(
        r#"<svg class="chart" xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {width} {height}" role="img" aria-label="{}" font-family="Helvetica, Arial, sans-serif">"#,
        escape(&c.title)
    );
    let mut clip_id = 0;
    for p in chart::layout(c, width, height) {
        match p {
            Prim::Line {
                from,
                to,
                colour,
                width,
            } => s.push_str(&format!(
                r#"<line x1="{:.1}" y1="{:.1}" x2="{:.1}" y2="{:.1}" stroke="{colour}" stroke-width="{width}"/>"#,
                from.0, from.1, to.0, to.1
            )),
            Prim::Poly {
                points,
                colour,
                width,
                dashed,
            } => {
                let pts: Vec<String> = points
                    .iter()
                    .map(|(x, y)| format!("{x:.1},{y:.1}"))
                    .collect();
                s.push_str(&format!(
                    r#"<polyline fill="none" stroke="{colour}" stroke-width="{width}"{} points="{}"/>"#,
                    if dashed {
                        r#" stroke-dasharray="4 3""#
                    } else {
                        ""
                    },
                    pts.join(" ")
                ));
            }
            Prim::Text {
                at,
                size,
                anchor,
                text,
                colour,
            } => {
                let a = match anchor {
                    Anchor::Start => "start",
                    Anchor::Middle => "middle",
                    Anchor::End => "end",
                };
                s.push_str(&format!(
                    r#"<text x="{:.1}" y="{:.1}" font-size="{size}" text-anchor="{a}" fill="{colour}">{}</text>"#,
                    at.0,
                    at.1,
                    escape(&text)
                ));
            }
            Prim::Clip([x, y, w, h]) => {
                clip_id += 1;
                s.push_str(&format!(
                    r#"<clipPath id="clip{clip_id}"><rect x="{x:.1}" y="{y:.1}" width="{w:.1}" height="{h:.1}"/></clipPath><g clip-path="url(#clip{clip_id})">"#
                ));
            }
            Prim::Unclip => s.push_str("</g>"),
        }
    }
    s.push_str("</svg>");
    s
}

/// The whole page.
pub fn render(blocks: &[Block], title: &str) -> String {
    let mut b = String::with_capacity(64 * 1024);
    b.push_str("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">");
    b.push_str("<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">");
    b.push_str(&format!(
        "<title>{}</title><style>{STYLE}</style></head><body>",
        escape(title)
    ));
    for block in blocks {
        match block {
            Block::Title { title, subtitle } => {
                b.push_str(&format!(
                    "<h1>{}</h1><p class=\"subtitle\">{}</p>",
                    escape(title),
                    escape(subtitle)
                ));
            }
            Block::Status(items) => {
                b.push_str("<div class=\"status\">");
                for (caption, value, tone) in items {
                    b.push_str(&format!(
                        "<div class=\"{}\"><span class=\"caption\">{}</span><span class=\"value\">{}</span></div>",
                        tone_class(*tone),
                        escape(caption),
                        escape(value)
                    ));
                }
                b.push_str("</div>");
            }
            Block::Heading(t) => b.push_str(&format!("<h2>{}</h2>", escape(t))),
            Block::Para(t) => b.push_str(&format!("<p>{}</p>", escape(t))),
            Block::Muted(t) => b.push_str(&format!("<p class=\"muted\">{}</p>", escape(t))),
            Block::KeyValues(kv) => {
                b.push_str("<table class=\"kv\"><tbody>");
                for (k, v) in kv {
                    b.push_str(&format!(
                        "<tr><th>{}</th><td>{}</td></tr>",
                        escape(k),
                        escape(v)
                    ));
                }
                b.push_str("</tbody></table>");
            }
            Block::Table { head, rows } => {
                b.push_str("<table><thead><tr>");
                for h in head {
                    b.push_str(&format!("<th>{}</th>", escape(h)));
                }
                b.push_str("</tr></thead><tbody>");
                for r in rows {
                    b.push_str("<tr>");
                    for c in r {
                        let class = [if c.numeric { "num" } else { "" }, tone_class(c.tone)]
                            .iter()
                            .filter(|s| !s.is_empty())
                            .copied()
                            .collect::<Vec<_>>()
                            .join(" ");
                        b.push_str(&format!("<td class=\"{class}\">{}</td>", escape(&c.text)));
                    }
                    b.push_str("</tr>");
                }
                b.push_str("</tbody></table>");
            }
            Block::Chart(c) => {
                b.push_str("<figure>");
                b.push_str(&svg(c, 720.0, 230.0));
                b.push_str("</figure>");
            }
            Block::PageBreak => b.push_str("<div class=\"page-break\"></div>"),
            Block::Signatures(who) => {
                b.push_str("<div class=\"signatures\">");
                for w in who {
                    b.push_str(&format!("<div>{}: name, date, signature</div>", escape(w)));
                }
                b.push_str("</div>");
            }
        }
        b.push('\n');
    }
    b.push_str("</body></html>\n");
    b
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::report::{build, tests::input};

    #[test]
    fn base64_matches_the_rfc_4648_test_vectors() {
        // Source: RFC 4648 (2006), section 10, test vectors.
        for (plain, coded) in [
            ("", ""),
            ("f", "Zg=="),
            ("fo", "Zm8="),
            ("foo", "Zm9v"),
            ("foob", "Zm9vYg=="),
            ("fooba", "Zm9vYmE="),
            ("foobar", "Zm9vYmFy"),
        ] {
            assert_eq!(base64(plain.as_bytes()), coded);
        }
        assert!(style_source().starts_with("'sha256-") && style_source().len() == 53);
    }

    #[test]
    fn the_page_is_self_contained_and_escapes_what_users_typed() {
        let mut i = input();
        i.operator = "<script>alert(1)</script>".into();
        let page = render(&build(&i), "r");
        assert!(page.starts_with("<!DOCTYPE html>"));
        assert!(page.contains("@media print"));
        assert!(page.contains("page-break"));
        assert!(!page.contains("<script"), "typed text must be escaped");
        assert!(page.contains("&lt;script&gt;"));
        assert!(!page.contains("http://") || !page.contains("src=\"http"));
        assert!(!page.contains("<link"), "no external stylesheet");
        assert_eq!(page.matches("<svg").count(), 3, "|Z|, L and Q plots");
        assert!(page.contains("<polyline"));
    }
}
