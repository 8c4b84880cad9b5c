package api

import (
	"bytes"
	"html/template"
	"net/http"
	"time"

	"github.com/classwatch/classwatch/windows"
)

// pageCSS is the stylesheet shared by every page and the audit report: the
// visual language of package chart (paper, teal ramp, brick accent) in
// HTML. Pages fetch nothing: no fonts, images, styles or scripts.
const pageCSS = `
:root { --ink:#1b2b33; --paper:#fbfaf6; --rule:#d9d6cc; --teal:#2b6670; --sage:#d3e2d6; --accent:#b8522e; --muted:#5d6b70; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink); font:14px/1.45 system-ui,-apple-system,"Segoe UI",sans-serif; font-variant-numeric:tabular-nums; }
.top { border-top:6px solid var(--teal); border-bottom:1px solid var(--rule); background:#f3f1ea; }
.top .in, main, .foot { max-width:92rem; margin:0 auto; padding:0 1.25rem; }
.top .in { display:flex; align-items:baseline; gap:1.25rem; flex-wrap:wrap; padding-top:.8rem; padding-bottom:.6rem; }
.brand { font-weight:700; font-size:1.25rem; letter-spacing:.02em; text-decoration:none; color:var(--ink); }
.brand i { display:inline-block; width:.8rem; height:.8rem; margin-right:.35rem; background:linear-gradient(135deg,var(--teal) 0 50%,var(--sage) 50%); border:1px solid var(--ink); }
nav a { margin-right:.9rem; }
h1 { font-size:1.35rem; margin:1.2rem 0 .2rem; }
h2 { font-size:1.1rem; margin:1.6rem 0 .4rem; padding-bottom:.15rem; border-bottom:2px solid var(--sage); }
h3 { font-size:.98rem; margin:1rem 0 .3rem; }
a { color:var(--teal); }
.muted, .note { color:var(--muted); }
.note { font-size:.88rem; }
.caution { border:1px solid var(--accent); border-left-width:5px; padding:.45rem .8rem; margin:.8rem 0; background:#fff; }
dfn { font-style:normal; font-weight:600; }
table { border-collapse:collapse; margin:.3rem 0 .6rem; }
th, td { padding:.18rem .55rem; text-align:right; white-space:nowrap; border-bottom:1px solid var(--rule); vertical-align:top; }
th { font-weight:600; font-size:.85rem; color:var(--muted); border-bottom:1.5px solid var(--ink); }
th:first-child, td:first-child, .l { text-align:left; }
td.wrap { white-space:normal; }
.tag { display:inline-block; padding:0 .45rem; border-radius:2px; font-size:.8rem; font-weight:600; letter-spacing:.03em; }
.tag.firing { background:var(--accent); color:#fff; }
.tag.pending { border:1.5px dashed var(--accent); color:var(--accent); }
.tag.ok { border:1px solid var(--teal); color:var(--teal); }
.tri { color:var(--accent); }
.stale { color:var(--accent); font-weight:600; }
.alerts { list-style:none; padding:0; margin:.4rem 0; }
.alerts li { display:grid; grid-template-columns:5.5rem 1fr; gap:.2rem .8rem; padding:.4rem .6rem; margin:.3rem 0; background:#fff; border:1px solid var(--rule); border-left:5px solid var(--accent); }
.alerts li.pending { border-left-style:dashed; }
.models td.model { font-weight:600; }
.models tr.first td { border-top:1.5px solid var(--ink); }
table.models { width:100%; }
td.worst { white-space:normal; width:50%; }
.worst > span { white-space:nowrap; margin-right:.9rem; display:inline-block; }
.worst .muted { font-size:.85em; }
.grid { display:flex; flex-wrap:wrap; gap:.6rem 1.6rem; align-items:flex-start; }
.grid figure { margin:0; }
figcaption { font-size:.85rem; color:var(--muted); margin-bottom:.2rem; }
.cw-chart { display:block; }
.cw-chart text { font:11px system-ui,sans-serif; fill:var(--ink); }
.cw-chart .cw-axis { font-weight:600; fill:var(--muted); }
.cw-chart .cw-cell { font-size:12px; font-weight:600; }
.cw-chart .cw-small { font-size:9.5px; }
.cw-chart .cw-muted { fill:var(--muted); }
form.seg { display:inline-flex; gap:.4rem; align-items:center; }
form.seg input { font:inherit; padding:.1rem .3rem; border:1px solid var(--rule); }
form.seg button { font:inherit; border:1px solid var(--teal); background:#fff; color:var(--teal); padding:.05rem .6rem; }
.foot { padding:1.5rem 1.25rem 2rem; color:var(--muted); font-size:.85rem; }
code { font-size:.9em; }
`

// layoutHTML wraps a page's "content" template.
const layoutHTML = `{{define "layout"}}<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{{.Title}} · classwatch</title>
<link rel="icon" href="data:,">
<style>{{css}}</style>
</head>
<body>
<div class="top"><div class="in"><a class="brand" href="/"><i></i>classwatch</a>
<nav><a href="/">on-call overview</a><a href="/v1/models">models JSON</a><a href="/v1/alerts">alerts JSON</a><a href="/metrics">metrics</a></nav>
<span class="note">generated {{.Generated}}</span></div></div>
<main>
{{template "content" .}}
</main>
<div class="foot">Figures are evidence about how a model behaved on the traffic it saw and the labels known so far; they are not a validation of the model. Where a model's use is regulated, the regulations and licensed practice that govern it decide; see README "A caution". A figure shown as – is undefined: its denominator is zero.</div>
</body>
</html>{{end}}`

// pageFuncs are the helpers every page template may call.
func pageFuncs() template.FuncMap {
	return template.FuncMap{
		"css":   func() template.CSS { return template.CSS(pageCSS) },
		"ratio": htmlNum,
		"ci":    htmlInterval,
		"rfc":   func(t time.Time) string { return t.UTC().Format(time.RFC3339) },
	}
}

// parsePage parses the layout with one page's content template.
func parsePage(name, content string) *template.Template {
	t := template.Must(template.New(name).Funcs(pageFuncs()).Parse(layoutHTML))
	return template.Must(t.Parse(content))
}

// pageHead are the fields the layout reads.
type pageHead struct {
	Title     string
	Generated string
}

// render executes t's layout with data into w; a failure before any byte
// was written becomes a 500.
func (a *API) render(w http.ResponseWriter, r *http.Request, t *template.Template, status int, data any) {
	var buf bytes.Buffer
	if err := t.ExecuteTemplate(&buf, "layout", data); err != nil {
		a.log.ErrorContext(r.Context(), "render page", "path", r.URL.Path, "err", err)
		http.Error(w, "cannot render the page", http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.WriteHeader(status)
	w.Write(buf.Bytes())
}

// errorContent is the content of an error page.
const errorContent = `{{define "content"}}<h1>{{.Title}}</h1><p>{{.Message}}</p><p><a href="/">Back to the on-call overview</a></p>{{end}}`

type errorPage struct {
	pageHead
	Message string
}

// pageError answers a page request with a small HTML error page.
func (a *API) pageError(w http.ResponseWriter, r *http.Request, status int, title, msg string) {
	a.render(w, r, a.pages.errPage, status, errorPage{pageHead{Title: title, Generated: a.now().UTC().Format(time.RFC3339)}, msg})
}

// ago prints how long before now t was, rounded to a readable unit.
func ago(now, t time.Time) string {
	if t.IsZero() {
		return "never"
	}
	d := now.Sub(t)
	switch {
	case d < 0:
		return "in " + windows.FormatDuration(roundAge(-d)) + " (clock ahead)"
	case d < time.Second:
		return "just now"
	}
	return windows.FormatDuration(roundAge(d)) + " ago"
}

// roundAge keeps the two largest units of d: 3d4h, 2h15m, 45s.
func roundAge(d time.Duration) time.Duration {
	switch {
	case d >= 24*time.Hour:
		return d.Truncate(time.Hour)
	case d >= time.Hour:
		return d.Truncate(time.Minute)
	}
	return d.Truncate(time.Second)
}
