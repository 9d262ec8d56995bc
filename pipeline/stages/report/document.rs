//! The report as one document model rendered twice: the sections and their
//! blocks (prose, lists, tables, figures) are put together once, and
//! [`Document::html`] and [`Document::markdown`] only lay them out, so the
//! two files cannot drift apart in content or numbering. Tables and
//! figures are numbered in the order they appear.

use super::figures::Figure;
use super::tables::{ReportTable, html_escape, html_prose, markdown_escape as md};

/// One piece of a section.
pub(crate) enum Block<'a> {
    /// A paragraph; backticks mark code, as in Markdown.
    Prose(String),
    Bullets(Vec<String>),
    Numbered(Vec<String>),
    /// Preformatted text (the protocol's timeline).
    Pre(String),
    Table(&'a ReportTable),
    Figure(&'a Figure),
    /// A link to a file beside the report, with the text of the link.
    Link(String, String),
    /// (file, SHA-256) pairs, folded away in HTML.
    Files(&'a [(String, String)]),
}

pub(crate) struct Section<'a> {
    /// The anchor in HTML.
    pub id: &'static str,
    pub title: String,
    pub blocks: Vec<Block<'a>>,
}

impl<'a> Section<'a> {
    pub fn new(id: &'static str, title: impl Into<String>) -> Self {
        Section {
            id,
            title: title.into(),
            blocks: Vec::new(),
        }
    }

    pub fn push(&mut self, b: Block<'a>) -> &mut Self {
        self.blocks.push(b);
        self
    }
}

pub(crate) struct Document<'a> {
    pub title: String,
    /// Lines under the title: study, dates, tool version.
    pub byline: Vec<String>,
    pub cautions: &'a [&'a str],
    pub sections: Vec<Section<'a>>,
}

const STYLE: &str = "body{font-family:'DejaVu Sans',Verdana,sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#222;line-height:1.45}\nh1{font-size:1.6em;border-bottom:3px solid #0072b2;padding-bottom:.2em;margin-bottom:.3em}\n.byline{color:#555;margin:.2em 0}\nh2{font-size:1.25em;margin-top:2em;color:#0072b2}\n.caution{border-left:5px solid #d55e00;background:#fff6ef;padding:.6em 1em;margin:1em 0}\nnav ol{columns:2;max-width:40em}\ntable{border-collapse:collapse;margin:1em 0;font-size:.88em}\ncaption{text-align:left;font-style:italic;padding:.3em 0}\nth,td{padding:.25em .6em;border-bottom:1px solid #ddd}\nthead th{border-bottom:2px solid #444;text-align:left}\n.num{text-align:right;font-variant-numeric:tabular-nums}\nfigure{margin:1.5em 0}\nfigure svg{max-width:100%;height:auto}\nfigcaption{font-size:.9em;color:#444}\npre{background:#f6f6f6;padding:.8em;overflow-x:auto;font-size:.85em}\ncode{font-size:.9em}\n";

/// SVG text without its XML declaration, for inlining in HTML.
fn strip_xml_header(svg: &str) -> &str {
    match svg.find("<svg") {
        Some(i) => &svg[i..],
        None => svg,
    }
}

impl Document<'_> {
    pub fn html(&self) -> String {
        let mut h = format!(
            "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n<title>{}</title>\n<style>\n{STYLE}</style>\n</head>\n<body>\n<h1>{}</h1>\n",
            html_escape(&self.title),
            html_escape(&self.title)
        );
        for l in &self.byline {
            h.push_str(&format!("<p class=\"byline\">{}</p>\n", html_prose(l)));
        }
        h.push_str("<div class=\"caution\"><strong>Cautions.</strong><ul>");
        for c in self.cautions {
            h.push_str(&format!("<li>{}</li>", html_escape(c)));
        }
        h.push_str("</ul></div>\n<nav><strong>Contents</strong><ol>");
        for s in &self.sections {
            h.push_str(&format!(
                "<li><a href=\"#{}\">{}</a></li>",
                s.id,
                html_escape(&s.title)
            ));
        }
        h.push_str("</ol></nav>\n");
        let (mut tables, mut figures) = (0, 0);
        for s in &self.sections {
            h.push_str(&format!(
                "<h2 id=\"{}\">{}</h2>\n",
                s.id,
                html_escape(&s.title)
            ));
            for b in &s.blocks {
                match b {
                    Block::Prose(p) => h.push_str(&format!("<p>{}</p>\n", html_prose(p))),
                    Block::Bullets(v) | Block::Numbered(v) => {
                        let tag = if matches!(b, Block::Bullets(_)) {
                            "ul"
                        } else {
                            "ol"
                        };
                        h.push_str(&format!("<{tag}>\n"));
                        for l in v {
                            h.push_str(&format!("<li>{}</li>\n", html_prose(l)));
                        }
                        h.push_str(&format!("</{tag}>\n"));
                    }
                    Block::Pre(t) => h.push_str(&format!("<pre>{}</pre>\n", html_escape(t))),
                    Block::Table(t) => {
                        tables += 1;
                        h.push_str(&t.html(tables));
                    }
                    Block::Figure(f) => {
                        figures += 1;
                        h.push_str(&format!(
                            "<figure id=\"fig-{}\">\n{}\n<figcaption><strong>Figure {figures}.</strong> {}</figcaption>\n</figure>\n",
                            f.name,
                            strip_xml_header(&f.svg),
                            html_prose(&f.caption)
                        ));
                    }
                    Block::Link(href, text) => h.push_str(&format!(
                        "<p><a href=\"{}\">{}</a></p>\n",
                        html_escape(href),
                        html_prose(text)
                    )),
                    Block::Files(files) => {
                        h.push_str("<details><summary>Input files and their SHA-256</summary>\n<table><tbody>\n");
                        for (p, k) in files.iter() {
                            h.push_str(&format!(
                                "<tr><td><code>{}</code></td><td><code>{}</code></td></tr>\n",
                                html_escape(p),
                                k
                            ));
                        }
                        h.push_str("</tbody></table>\n</details>\n");
                    }
                }
            }
        }
        h.push_str("</body>\n</html>\n");
        h
    }

    pub fn markdown(&self) -> String {
        let mut m = format!("# {}\n\n", md(&self.title));
        for l in &self.byline {
            m.push_str(&format!("{}\n\n", md(l)));
        }
        m.push_str("> **Cautions.**\n");
        for c in self.cautions {
            m.push_str(&format!("> - {c}\n"));
        }
        m.push_str("\n**Contents:** ");
        let contents: Vec<String> = self.sections.iter().map(|s| s.title.clone()).collect();
        m.push_str(&contents.join(" · "));
        m.push_str("\n\n");
        let (mut tables, mut figures) = (0, 0);
        for s in &self.sections {
            m.push_str(&format!("## {}\n\n", md(&s.title)));
            for b in &s.blocks {
                match b {
                    Block::Prose(p) => m.push_str(&format!("{}\n\n", md(p))),
                    Block::Bullets(v) => {
                        for l in v {
                            m.push_str(&format!("- {}\n", md(l)));
                        }
                        m.push('\n');
                    }
                    Block::Numbered(v) => {
                        for (i, l) in v.iter().enumerate() {
                            m.push_str(&format!("{}. {}\n", i + 1, md(l)));
                        }
                        m.push('\n');
                    }
                    Block::Pre(t) => m.push_str(&format!("```\n{t}```\n\n")),
                    Block::Table(t) => {
                        tables += 1;
                        m.push_str(&format!(
                            "**Table {tables}.** {}\n\n{}\n",
                            md(&t.caption),
                            t.markdown()
                        ));
                    }
                    Block::Figure(f) => {
                        figures += 1;
                        m.push_str(&format!(
                            "![{}](figures/{}.png)\n\n**Figure {figures}.** {}\n\n",
                            f.name,
                            f.name,
                            md(&f.caption)
                        ));
                    }
                    Block::Link(href, text) => m.push_str(&format!("[{}]({href})\n\n", md(text))),
                    Block::Files(files) => {
                        m.push_str("| input file | SHA-256 |\n|---|---|\n");
                        for (p, k) in files.iter() {
                            m.push_str(&format!("| `{p}` | `{k}` |\n"));
                        }
                        m.push('\n');
                    }
                }
            }
        }
        m
    }
}
