//! The HTML report: one self-contained page (styles inline, figures as
//! data URIs, no scripts, nothing fetched over the network), rendered from
//! a template with auto-escaping, so no text from a sweep file can become
//! markup.

use base64::Engine as _;
use serde::Serialize;

use crate::chart::{self, ChartError, Figure};

/// Why the page could not be made.
#[derive(Debug, thiserror::Error)]
pub enum ReportError {
    /// A figure failed.
    #[error(transparent)]
    Chart(#[from] ChartError),
    /// The template failed (a bug).
    #[error("cannot render the report page: {0}")]
    Template(String),
}

/// A table: caption, header and rows of text.
#[derive(Clone, Debug, Default, Serialize)]
pub struct Table {
    /// Caption above the table.
    pub caption: String,
    /// Column headings.
    pub header: Vec<String>,
    /// Rows of cells.
    pub rows: Vec<Vec<String>>,
}

/// A figure on the page.
#[derive(Clone, Debug, Default, Serialize)]
pub struct FigureRef {
    /// Caption under the figure.
    pub caption: String,
    /// Alternative text.
    pub alt: String,
    /// The image as a `data:` URI (made by [`FigureRef::svg_text`]: base64,
    /// so it holds no quote and is written into the page unescaped).
    src: String,
    /// Name of the PNG copy written beside the page, if any.
    pub png: Option<String>,
}

impl FigureRef {
    /// Embeds `fig` as an SVG data URI.
    pub fn svg(
        fig: &impl Figure,
        caption: impl Into<String>,
        alt: impl Into<String>,
    ) -> Result<FigureRef, ReportError> {
        Ok(FigureRef::svg_text(&chart::svg_string(fig)?, caption, alt))
    }

    /// Embeds SVG text as a data URI.
    pub fn svg_text(text: &str, caption: impl Into<String>, alt: impl Into<String>) -> FigureRef {
        FigureRef {
            caption: caption.into(),
            alt: alt.into(),
            src: format!(
                "data:image/svg+xml;base64,{}",
                base64::engine::general_purpose::STANDARD.encode(text.as_bytes())
            ),
            png: None,
        }
    }
}

/// One section of the page.
#[derive(Clone, Debug, Default, Serialize)]
pub struct Section {
    /// Anchor id (letters, digits and dashes).
    pub id: String,
    /// Heading.
    pub title: String,
    /// Paragraphs before the tables and figures.
    pub intro: Vec<String>,
    /// Tables.
    pub tables: Vec<Table>,
    /// Figures.
    pub figures: Vec<FigureRef>,
    /// Paragraphs after them.
    pub notes: Vec<String>,
    /// A preformatted block (the sweep file).
    pub pre: Option<String>,
}

/// The whole page.
#[derive(Clone, Debug, Default, Serialize)]
pub struct Page {
    /// Page title (the sweep's name).
    pub title: String,
    /// One line under the title.
    pub subtitle: String,
    /// Cautions shown at the top, in a box.
    pub cautions: Vec<String>,
    /// Key facts as label / value pairs.
    pub facts: Vec<(String, String)>,
    /// The sections, in order.
    pub sections: Vec<Section>,
    /// The footer line (tool, version, date, source file).
    pub footer: String,
}

const TEMPLATE: &str = include_str!("../templates/report.html");
const STYLE: &str = include_str!("../templates/report.css");

/// Renders the page to HTML.
pub fn render(page: &Page) -> Result<String, ReportError> {
    let mut env = minijinja::Environment::new();
    env.add_template("report.html", TEMPLATE)
        .map_err(|e| ReportError::Template(e.to_string()))?;
    let t = env
        .get_template("report.html")
        .map_err(|e| ReportError::Template(e.to_string()))?;
    t.render(minijinja::context! { page => page, style => STYLE })
        .map_err(|e| ReportError::Template(e.to_string()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn text_is_escaped() {
        let page = Page {
            title: "<script>alert(1)</script>".into(),
            sections: vec![Section {
                id: "s".into(),
                title: "a & b".into(),
                pre: Some("x = \"</pre><b>\"".into()),
                ..Default::default()
            }],
            ..Default::default()
        };
        let html = render(&page).expect("renders");
        assert!(!html.contains("<script>"));
        assert!(html.contains("&lt;script&gt;"));
        assert!(html.contains("a &amp; b"));
        assert!(!html.contains("</pre><b>"));
    }
}
