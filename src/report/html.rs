//! The page around the charts: escaping, tables and the stylesheet. Every
//! piece of text from the log, the config or a file goes through `escape`.

/// Escapes text for HTML element content and double-quoted attributes.
pub fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            // Control characters never belong on the page (the log can
            // hold any text a user typed as a reason).
            c if c.is_control() && c != '\n' && c != '\t' => out.push('\u{fffd}'),
            c => out.push(c),
        }
    }
    out
}

/// A table; `header` and every cell are plain text (escaped here).
/// `row_attr` gives extra attributes for each row, already escaped.
pub fn table(class: &str, header: &[&str], rows: &[Vec<String>], row_attr: &[String]) -> String {
    let mut s = format!("<table class=\"{}\">\n<thead><tr>", escape(class));
    for h in header {
        s.push_str(&format!("<th>{}</th>", escape(h)));
    }
    s.push_str("</tr></thead>\n<tbody>\n");
    for (i, r) in rows.iter().enumerate() {
        let attr = row_attr.get(i).map_or("", String::as_str);
        s.push_str(&format!("<tr{attr}>"));
        for c in r {
            s.push_str(&format!("<td>{}</td>", escape(c)));
        }
        s.push_str("</tr>\n");
    }
    s.push_str("</tbody>\n</table>\n");
    s
}

/// A paragraph saying what is missing and what to do.
pub fn missing(text: &str) -> String {
    format!("<p class=\"missing\">{}</p>\n", escape(text))
}

/// A paragraph of explanation under a heading.
pub fn note(text: &str) -> String {
    format!("<p class=\"note\">{}</p>\n", escape(text))
}

/// One numbered section.
pub fn section(id: &str, title: &str, body: &str) -> String {
    format!(
        "<section id=\"{}\">\n<h2>{}</h2>\n{body}</section>\n",
        escape(id),
        escape(title)
    )
}

/// A chart in a figure with a caption.
pub fn figure(svg: &str, caption: &str) -> String {
    format!(
        "<figure>\n{svg}\n<figcaption>{}</figcaption>\n</figure>\n",
        escape(caption)
    )
}

/// The whole page.
pub fn page(title: &str, header: &str, nav: &[(&str, &str)], body: &str) -> String {
    let mut links = String::new();
    for (id, label) in nav {
        links.push_str(&format!(
            "<a href=\"#{}\">{}</a>\n",
            escape(id),
            escape(label)
        ));
    }
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <title>{}</title>\n<style>\n{STYLE}</style>\n</head>\n<body>\n\
         <header>\n{header}</header>\n<nav>\n{links}</nav>\n<main>\n{body}</main>\n</body>\n</html>\n",
        escape(title)
    )
}

const STYLE: &str = "\
:root { --ink: #1d2b36; --paper: #f6f4ee; --card: #ffffff; --rule: #dcd8cc; --accent: #1f6f8b; --muted: #5d6b75; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--paper); color: var(--ink);
  font: 15px/1.45 system-ui, -apple-system, \"Segoe UI\", Roboto, sans-serif; }
header { padding: 20px 32px 12px; border-bottom: 3px solid var(--accent); background: var(--card); }
header h1 { margin: 0 0 4px; font-size: 24px; letter-spacing: 0.02em; }
header .facts { margin: 0; color: var(--muted); }
header .facts b { color: var(--ink); }
nav { padding: 8px 32px; background: var(--card); border-bottom: 1px solid var(--rule); }
nav a { color: var(--accent); margin-right: 18px; text-decoration: none; font-size: 14px; }
nav a:hover { text-decoration: underline; }
main { padding: 8px 32px 40px; max-width: 1120px; }
section { background: var(--card); border: 1px solid var(--rule); border-radius: 6px;
  padding: 14px 20px 18px; margin: 18px 0; }
h2 { margin: 0 0 6px; font-size: 18px; }
h3 { margin: 14px 0 6px; font-size: 15px; }
p.note { margin: 0 0 10px; color: var(--muted); max-width: 900px; }
p.missing { margin: 8px 0; padding: 10px 14px; background: #fbf3e2; border-left: 4px solid #d88a1e; }
figure { margin: 8px 0 0; overflow-x: auto; }
figure svg { max-width: 100%; height: auto; display: block; }
figcaption { color: var(--muted); font-size: 13px; margin-top: 4px; }
div.beside { display: flex; flex-wrap: wrap; gap: 18px; align-items: flex-start; }
div.beside figure { flex: 1 1 560px; min-width: 0; }
div.beside aside { flex: 1 1 260px; color: var(--muted); font-size: 13px; }
div.beside aside p { margin: 6px 0 10px; }
table { border-collapse: collapse; width: 100%; font-size: 13px; margin-top: 6px; }
th, td { text-align: left; padding: 4px 8px; border-bottom: 1px solid #ebe8df; vertical-align: top; }
th { background: #efece3; font-weight: 600; position: sticky; top: 0; }
tbody tr:nth-child(even) { background: #faf9f5; }
td:first-child { white-space: nowrap; }
table.log td:nth-child(2) { white-space: nowrap; color: var(--muted); }
table.log td:nth-child(4) { white-space: nowrap; font-weight: 600; }
tr.saw-aside td { background: #fbf3e2; }
tr.saw-aside td:first-child { border-left: 4px solid #d88a1e; }
ul.notes { color: var(--muted); font-size: 13px; }
";

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escaping_covers_markup_quotes_and_control_characters() {
        assert_eq!(
            escape("<script>alert(\"x\") & 'y'</script>"),
            "&lt;script&gt;alert(&quot;x&quot;) &amp; &#39;y&#39;&lt;/script&gt;"
        );
        assert_eq!(escape("a\u{1b}[31mb"), "a\u{fffd}[31mb");
        assert_eq!(escape("plain é text"), "plain é text");
        assert_eq!(escape("&amp;"), "&amp;amp;");
    }

    #[test]
    fn tables_escape_every_cell_and_keep_row_attributes() {
        let t = table(
            "log",
            &["kind", "summary"],
            &[vec!["shelved".into(), "<b>bold</b>".into()]],
            &[" data-seq=\"3\"".into()],
        );
        assert!(
            t.contains("<tr data-seq=\"3\"><td>shelved</td><td>&lt;b&gt;bold&lt;/b&gt;</td></tr>")
        );
        assert!(!t.contains("<b>"));
    }
}
