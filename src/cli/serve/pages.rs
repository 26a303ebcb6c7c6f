//! The pages, their style and their script, built into the binary (no file is read at run time
//! and nothing is fetched from elsewhere). The pages are minijinja templates, every value
//! escaped for HTML; the station view's live parts are drawn by its script from the screen's
//! JSON, as text, never as markup.

use axum::http::{StatusCode, header};
use axum::response::{Html, IntoResponse, Response};
use std::sync::LazyLock;

static PAGES: LazyLock<minijinja::Environment<'static>> = LazyLock::new(|| {
    let mut env = minijinja::Environment::new();
    for (name, text) in [
        (
            "base.html",
            include_str!("../../../templates/web/base.html"),
        ),
        (
            "station.html",
            include_str!("../../../templates/web/station.html"),
        ),
        (
            "archive.html",
            include_str!("../../../templates/web/archive.html"),
        ),
        (
            "verify.html",
            include_str!("../../../templates/web/verify.html"),
        ),
        (
            "message.html",
            include_str!("../../../templates/web/message.html"),
        ),
        (
            "runs.html",
            include_str!("../../../templates/web/runs.html"),
        ),
    ] {
        env.add_template(name, text)
            .expect("the built-in pages are valid templates");
    }
    env
});

/// A page rendered with `context`.
pub(super) fn page(name: &str, context: minijinja::Value) -> Response {
    let view = if name == "station.html" {
        "station"
    } else {
        "archive"
    };
    let rendered = PAGES
        .get_template(name)
        .and_then(|t| t.render(minijinja::context! { view => view, ..context }));
    match rendered {
        Ok(html) => Html(html).into_response(),
        Err(e) => (
            StatusCode::INTERNAL_SERVER_ERROR,
            format!("the page {name} could not be made: {e}"),
        )
            .into_response(),
    }
}

/// The style or the script.
pub(super) fn asset(name: &str) -> Response {
    let (kind, text) = match name {
        "screen.css" => (
            "text/css; charset=utf-8",
            include_str!("../../../templates/web/screen.css"),
        ),
        _ => (
            "text/javascript; charset=utf-8",
            include_str!("../../../templates/web/station.js"),
        ),
    };
    ([(header::CONTENT_TYPE, kind)], text).into_response()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A value from the archive or the page cannot become markup: minijinja escapes it in
    /// every page (HTML escaping as OWASP's cross-site scripting cheat sheet describes it:
    /// & < > " ' written as entities).
    #[test]
    fn values_are_escaped_in_every_page() {
        let evil = "<script>alert(1)</script>\"'&";
        let html = PAGES
            .get_template("message.html")
            .unwrap()
            .render(minijinja::context! { title => evil, text => evil, view => "archive" })
            .unwrap();
        assert!(!html.contains("<script>alert"), "{html}");
        assert!(
            html.contains("&lt;script&gt;alert(1)&lt;&#x2f;script&gt;"),
            "{html}"
        );
    }
}
