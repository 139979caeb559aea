package main

import (
	"fmt"
	"html"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
)

var (
	tagRE   = regexp.MustCompile(`<(/?)([a-zA-Z][a-zA-Z0-9]*)([^>]*)>`)
	attrRE  = regexp.MustCompile(`([a-zA-Z-]+)="([^"]*)"`)
	stripRE = regexp.MustCompile(`<[^>]*>`)
)

func attrs(s string) map[string]string {
	out := map[string]string{}
	for _, m := range attrRE.FindAllStringSubmatch(s, -1) {
		out[m[1]] = m[2]
	}
	return out
}

// reportStructure describes an HTML report by its structure, not its
// numbers: title and headings, each figure's id, declared and drawn
// series, SVG elements, axis labels, reported points and threshold marks
// and caption, each table's header and row count, and the product
// sections. Captions and headings carry counts (products, refits,
// segments), which a fixed seed fixes; floats in tables are left out.
func reportStructure(t *testing.T, page string) string {
	t.Helper()
	var b strings.Builder
	tags := tagRE.FindAllStringSubmatchIndex(page, -1)
	type figState struct {
		id, declared                                string
		series, svg, axis, reported, threshold, cap int
		caption                                     string
	}
	var fig *figState
	var table []string // id, header cells
	rows, inHead, inSVG := 0, false, false
	textUntil := func(i int, name string) string {
		end := strings.Index(page[i:], "</"+name+">")
		if end < 0 {
			t.Fatalf("no </%s> after offset %d", name, i)
		}
		return strings.Join(strings.Fields(html.UnescapeString(stripRE.ReplaceAllString(page[i:i+end], ""))), " ")
	}
	for _, m := range tags {
		closing, name, at := page[m[2]:m[3]] == "/", strings.ToLower(page[m[4]:m[5]]), attrs(page[m[6]:m[7]])
		switch {
		case name == "svg":
			inSVG = !closing
			if fig != nil && !closing {
				fig.svg++
			}
		case !closing && !inSVG && (name == "title" || name == "h1" || name == "h2" || name == "h3"):
			fmt.Fprintf(&b, "%s: %s\n", name, textUntil(m[1], name))
		case !closing && name == "section":
			fmt.Fprintf(&b, "section %s\n", at["id"])
		case !closing && name == "figure":
			fig = &figState{id: at["id"], declared: at["data-series"]}
		case fig != nil && !closing && name == "g" && strings.Contains(" "+at["class"]+" ", " series "):
			fig.series++
		case fig != nil && !closing && name == "text" && at["class"] == "axis-label":
			fig.axis++
		case fig != nil && !closing && name == "circle" && at["class"] == "reported":
			fig.reported++
		case fig != nil && !closing && name == "line" && strings.Contains(at["class"], "threshold"):
			fig.threshold++
		case fig != nil && !closing && name == "figcaption":
			fig.caption = textUntil(m[1], "figcaption")
		case fig != nil && closing && name == "figure":
			fmt.Fprintf(&b, "figure %s: series %s declared, %d drawn; %d svg, %d axis labels, %d reported points, %d threshold marks\n  caption: %s\n",
				fig.id, fig.declared, fig.series, fig.svg, fig.axis, fig.reported, fig.threshold, fig.caption)
			fig = nil
		case !closing && name == "table":
			table = []string{at["id"] + at["class"]}
			rows = 0
		case table != nil && name == "thead":
			inHead = !closing
		case table != nil && !closing && name == "th" && inHead:
			table = append(table, textUntil(m[1], "th"))
		case table != nil && !inHead && !closing && name == "tr":
			rows++
		case table != nil && closing && name == "table":
			fmt.Fprintf(&b, "table %s: %d rows; %s\n", table[0], rows, strings.Join(table[1:], " | "))
			table = nil
		}
	}
	return b.String()
}

// checkSelfContained fails when a report would load anything: scripts,
// styles, images or fonts from a file or the network.
func checkSelfContained(t *testing.T, name, page string) {
	t.Helper()
	for _, bad := range []string{`src="`, `rel="stylesheet"`, `@import`, `url(`, `@font-face`, `href="http`} {
		if strings.Contains(page, bad) {
			t.Errorf("%s: report is not self-contained: it holds %s", name, bad)
		}
	}
	if !strings.Contains(page, "not pricing advice") {
		t.Errorf("%s: report lacks the caution line", name)
	}
}

// TestReportGolden writes the HTML reports of fit and replay on fixed
// seeds and compares their structure (reportStructure) with the files
// under testdata/golden. After an intended change, rewrite them with
//
//	go test ./cmd/rivalmix -run TestReportGolden -update
//
// and review the diff.
func TestReportGolden(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	replayReport := filepath.Join(dir, "replay.html")
	code, _, stderr := runLine(t, "replay", "--in", "../../testdata/larkfield-refits.jsonl", "--out", filepath.Join(dir, "events.jsonl"),
		"--category", "breakfast-cereal", "--particles", "16", "--seed", "7", "--time", "2026-11-30T06:00:00Z",
		"--report", replayReport, "--quiet")
	if code != 0 {
		t.Fatalf("replay: exit %d: %s", code, stderr)
	}
	fitReport := filepath.Join(dir, "fit.html")
	code, _, stderr = runLine(t, "fit", "--in", "../../testdata/larkfield-cereal.jsonl", "--out", filepath.Join(dir, "posterior.json"),
		"--sweeps", "120", "--burn", "60", "--seed", "3", "--report", fitReport, "--quiet")
	if code != 0 {
		t.Fatalf("fit: exit %d: %s", code, stderr)
	}
	for _, f := range []struct{ got, golden string }{
		{replayReport, "larkfield-refits.report.txt"},
		{fitReport, "larkfield-cereal.fit-report.txt"},
	} {
		raw, err := os.ReadFile(f.got)
		if err != nil {
			t.Fatal(err)
		}
		page := string(raw)
		checkSelfContained(t, f.golden, page)
		st := reportStructure(t, page)
		if !strings.Contains(st, "figure decay:") || !strings.Contains(st, "figure membership:") {
			t.Errorf("%s: report lacks the decay or membership figure:\n%s", f.golden, st)
		}
		checkGolden(t, filepath.Join(goldenDir, f.golden), []byte(st))
	}
	// The replay report's timeline covers every refit of the file: eight
	// weekly ones and the refit-complete after the withdrawal.
	raw, _ := os.ReadFile(replayReport)
	if st := reportStructure(t, string(raw)); !strings.Contains(st, "h2: Over 9 refits") || !strings.Contains(st, "figure sizes:") {
		t.Errorf("replay report lacks the timeline over the 9 refits:\n%s", st)
	}
}

// TestReportUnwritable: a report that cannot be written is refused
// before any fitting, naming the flag.
func TestReportUnwritable(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	bad := filepath.Join(dir, "no-such-dir", "r.html")
	for _, args := range [][]string{
		{"fit", "--in", "../../testdata/larkfield-cereal.jsonl", "--out", filepath.Join(dir, "p.json"), "--report", bad, "--quiet"},
		{"replay", "--in", "../../testdata/larkfield-refits.jsonl", "--out", filepath.Join(dir, "e.jsonl"), "--category", "breakfast-cereal", "--report", bad, "--quiet"},
	} {
		code, _, stderr := runLine(t, args...)
		if code == 0 || !strings.Contains(stderr, "--report") {
			t.Errorf("%s with an unwritable report: exit %d, stderr %q", args[0], code, stderr)
		}
	}
}
