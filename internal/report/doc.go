// Package report renders a gate report (checks.Report) for people: as lines
// for a terminal and as one self-contained HTML page with plots. The JSON
// form is the report itself, described by schemas/report.schema.json.
//
// Every string taken from a report is treated as hostile: the terminal
// rendering escapes control and bidirectional-override characters, and the
// HTML rendering escapes all text.
package report
