package report

import (
	"bufio"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"unicode"

	"github.com/modelgate/modelgate/internal/checks"
)

// TerminalOptions adjusts the terminal rendering.
type TerminalOptions struct {
	// Color marks status words with ANSI colours. The text is the same with
	// or without it; the caller decides (a terminal, no NO_COLOR, …).
	Color bool
	// ReportDigest is the digest of the stored report artifact, printed
	// with the other digests when not empty.
	ReportDigest string
	// MaxFindings caps the findings listed under each check (the rest are
	// counted); 0 lists them all.
	MaxFindings int
}

const (
	ansiReset = "\x1b[0m"
	ansiBold  = "\x1b[1m"
)

// statusColor is the ANSI colour of a status word: plain red, green and
// yellow on the terminal's own background; SKIP stays uncoloured.
var statusColor = map[string]string{
	checks.StatusPass: "\x1b[32m",
	checks.StatusFail: "\x1b[1;31m",
	checks.StatusWarn: "\x1b[33m",
}

// Terminal writes r as text: one line per check (status, name, summary);
// under each check that did not pass, its FAIL and WARN findings; then the
// verdict line and the digests the report is bound to. Strings from the
// report are written with control characters escaped, so a hostile name
// cannot drive the terminal.
func Terminal(w io.Writer, r *checks.Report, opts TerminalOptions) error {
	if r == nil {
		return fmt.Errorf("rendering report: no report")
	}
	bw := bufio.NewWriter(w)
	paint := func(status, text string) string {
		if c, ok := statusColor[status]; ok && opts.Color {
			return c + text + ansiReset
		}
		return text
	}
	nameWidth := 0
	for _, c := range r.Checks {
		nameWidth = max(nameWidth, len([]rune(clean(c.Name))))
	}
	for _, c := range r.Checks {
		fmt.Fprintf(bw, "%s  %-*s  %s\n", paint(c.Status, statusWord(c.Status)), nameWidth, clean(c.Name), clean(c.Summary))
		if c.Status == checks.StatusPass {
			continue
		}
		indent := strings.Repeat(" ", 4+2+nameWidth+2)
		shown, hidden := 0, 0
		for _, f := range c.Findings {
			if f.Status != checks.StatusFail && f.Status != checks.StatusWarn {
				continue
			}
			if opts.MaxFindings > 0 && shown >= opts.MaxFindings {
				hidden++
				continue
			}
			shown++
			fmt.Fprintf(bw, "%s%s  %s\n", indent, paint(f.Status, statusWord(f.Status)), findingText(f))
		}
		if hidden > 0 {
			fmt.Fprintf(bw, "%s… and %d more\n", indent, hidden)
		}
	}
	bw.WriteString("\n")
	verdict := VerdictLine(r)
	if opts.Color {
		st := checks.StatusFail
		if r.Verdict == checks.VerdictPass {
			st = checks.StatusPass
		}
		word, rest, _ := strings.Cut(verdict, " — ")
		verdict = ansiBold + word + ansiReset + " — " + paint(st, rest)
	}
	bw.WriteString(verdict + "\n")
	if r.Verdict != checks.VerdictPass {
		for _, reason := range r.Reasons {
			fmt.Fprintf(bw, "  - %s\n", clean(reason))
		}
	}
	bw.WriteString("\n")
	rows := [][2]string{}
	if opts.ReportDigest != "" {
		rows = append(rows, [2]string{"report", clean(opts.ReportDigest)})
	}
	rows = append(rows,
		[2]string{"candidate", subjectLine(&r.Candidate)},
		[2]string{"baseline", subjectLineOr(r.Baseline, "none (first release)")},
		[2]string{"holdout", subjectLineOr(r.Holdout, "none")},
		[2]string{"policy", clean(r.Policy.Digest) + "  " + clean(policyLabel(r.Policy))},
		[2]string{"tool", clean(r.Tool.Name) + " " + clean(r.Tool.Version) + ", " + clean(r.Created)},
	)
	for _, row := range rows {
		fmt.Fprintf(bw, "%-10s %s\n", row[0], row[1])
	}
	if err := bw.Flush(); err != nil {
		return fmt.Errorf("writing report: %w", err)
	}
	return nil
}

// VerdictLine is the one-line verdict of r, as the terminal shows it and
// the HTML page heads with:
//
//	verdict: pass — NAME@DIGEST may replace NAME@DIGEST on TARGET
//	verdict: fail — N check(s) failed: a, b
//
// Strings from the report are escaped as for a terminal; digests are
// shortened to 12 hex digits.
func VerdictLine(r *checks.Report) string {
	if r.Verdict == checks.VerdictPass {
		s := "verdict: pass — " + clean(artifactName(&r.Candidate)) + "@" + shortDigest(r.Candidate.Digest)
		if r.Baseline == nil {
			return s + " may go to " + clean(r.Target) + " (first release)"
		}
		return s + " may replace " + clean(artifactName(r.Baseline)) + "@" + shortDigest(r.Baseline.Digest) + " on " + clean(r.Target)
	}
	failed := failedChecks(r)
	if len(failed) == 0 {
		// A fail verdict with no failing check: say what the report says.
		if len(r.Reasons) > 0 {
			return "verdict: " + clean(r.Verdict) + " — " + clean(r.Reasons[0])
		}
		return "verdict: " + clean(r.Verdict)
	}
	return fmt.Sprintf("verdict: fail — %d check(s) failed: %s", len(failed), clean(strings.Join(failed, ", ")))
}

func failedChecks(r *checks.Report) []string {
	var out []string
	for _, c := range r.Checks {
		if c.Status == checks.StatusFail {
			out = append(out, c.Name)
		}
	}
	return out
}

// statusWord pads or escapes a status to the four columns every known
// status takes.
func statusWord(s string) string {
	s = clean(s)
	if len(s) < 4 {
		s += strings.Repeat(" ", 4-len(s))
	}
	return s
}

func findingText(f checks.Finding) string {
	var b strings.Builder
	if f.Where != "" {
		b.WriteString(clean(f.Where))
		b.WriteString(": ")
	}
	b.WriteString(clean(f.Message))
	switch {
	case f.Value != nil && f.Limit != nil:
		fmt.Fprintf(&b, " (%s, limit %s)", num(*f.Value), num(*f.Limit))
	case f.Value != nil:
		fmt.Fprintf(&b, " (%s)", num(*f.Value))
	}
	if f.Code != "" {
		fmt.Fprintf(&b, " [%s]", clean(f.Code))
	}
	return b.String()
}

func subjectLine(s *checks.Subject) string {
	out := clean(s.Digest) + "  " + clean(s.Ref)
	if s.Rows > 0 {
		out += fmt.Sprintf(" (%d rows)", s.Rows)
	}
	return out
}

func subjectLineOr(s *checks.Subject, none string) string {
	if s == nil {
		return none
	}
	return subjectLine(s)
}

func policyLabel(p checks.Policy) string {
	switch {
	case p.Name != "" && p.Source != "":
		return p.Name + " (" + p.Source + ")"
	case p.Name != "":
		return p.Name
	}
	return p.Source
}

// artifactName is the repository part of a subject's reference (the name
// without tag or digest), or its spec name when the reference has none.
func artifactName(s *checks.Subject) string {
	ref := s.Ref
	if i := strings.IndexByte(ref, '@'); i >= 0 {
		ref = ref[:i]
	}
	slash := strings.LastIndexByte(ref, '/')
	if i := strings.LastIndexByte(ref, ':'); i > slash {
		ref = ref[:i]
	}
	if ref == "" {
		ref = s.Name
	}
	return ref
}

// shortDigest keeps the algorithm and 12 hex digits.
func shortDigest(d string) string {
	algo, hex, ok := strings.Cut(d, ":")
	if !ok || len(hex) <= 12 {
		return clean(d)
	}
	return clean(algo) + ":" + clean(hex[:12]) + "…"
}

// num formats a number compactly for people: four significant digits, or
// whole numbers from 10,000 on, grouped by thousands.
func num(v float64) string {
	if a := math.Abs(v); a >= 1e4 && a < 1e15 {
		s := strconv.FormatFloat(math.Round(a), 'f', 0, 64)
		var b strings.Builder
		if v < 0 {
			b.WriteByte('-')
		}
		for i, c := range s {
			if i > 0 && (len(s)-i)%3 == 0 {
				b.WriteByte(',')
			}
			b.WriteRune(c)
		}
		return b.String()
	}
	return strconv.FormatFloat(v, 'g', 4, 64)
}

// clean escapes what a terminal would act on: C0 and C1 controls, DEL,
// bidirectional overrides and invalid UTF-8, written as Go escapes.
func clean(s string) string {
	ok := true
	for _, r := range s {
		if unsafeRune(r) {
			ok = false
			break
		}
	}
	if ok {
		return s
	}
	var b strings.Builder
	for _, r := range s {
		if !unsafeRune(r) {
			b.WriteRune(r)
			continue
		}
		q := strconv.QuoteRuneToASCII(r)
		b.WriteString(q[1 : len(q)-1])
	}
	return b.String()
}

func unsafeRune(r rune) bool {
	switch {
	case r == unicode.ReplacementChar:
		return true // also what ranging over invalid UTF-8 yields
	case r < 0x20, r == 0x7f, r >= 0x80 && r < 0xa0:
		return true
	case r >= 0x202a && r <= 0x202e, r >= 0x2066 && r <= 0x2069, r == 0x200e, r == 0x200f, r == 0x061c:
		return true
	}
	return false
}

// HumanBytes writes a byte count with binary units: 512 B, 1.5 KiB,
// 200.0 MiB.
func HumanBytes(n int64) string {
	const unit = 1024
	if n < unit {
		return fmt.Sprintf("%d B", n)
	}
	div, exp := int64(unit), 0
	for m := n / unit; m >= unit; m /= unit {
		div *= unit
		exp++
	}
	return fmt.Sprintf("%.1f %ciB", float64(n)/float64(div), "KMGTPE"[exp])
}
