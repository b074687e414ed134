// Package web is modelgate's read-only web view for release managers: the
// tags of a store with their current targets and release logs, the
// candidates that have a gate report for a tag but are not promoted yet
// (verdict, approvals so far against the policy's requirement, the full
// gate report with its plots), and a page for any artifact (spec summary,
// layer table, lineage, referrers).
//
// The view never changes the store: it answers GET and HEAD only (405
// otherwise), and where an action is needed a page shows the exact CLI
// command to run, because approvals are signed on the approver's machine.
//
// Every page is rendered with html/template; every string read from the
// store (names, descriptions, annotations, report text) is treated as
// hostile and escaped. Pages use no script, and every response carries a
// Content-Security-Policy that forbids scripts, frames, forms to other
// origins and any fetch but the view's own style sheet. The gate report
// page is rendered by package report from the report's JSON (never from
// the HTML layer stored beside it); its inline styles are allowed by their
// hashes only.
package web
