package main

import (
	"bytes"
	"encoding/json"
	"flag"
	"fmt"
	"maps"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/cloudevents/sdk-go/v2/event"
)

var update = flag.Bool("update", false, "rewrite the golden files under testdata/golden from this run")

// goldenDir holds the committed outputs the golden tests compare with.
const goldenDir = "../../testdata/golden"

// TestReplayGolden replays the committed Larkfield fixture (eight weekly
// refits of an invented cereal category, then a withdrawal, a bad line and
// a refit-complete captured from the bus with its time) and compares the
// events and the rejected lines with the committed files byte for byte.
// After an intended change, rewrite them with
//
//	go test ./cmd/rivalmix -run TestReplayGolden -update
//
// and review the diff.
func TestReplayGolden(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	events, rejected := filepath.Join(dir, "events.jsonl"), filepath.Join(dir, "rejected.jsonl")
	code, _, stderr := runLine(t, "replay", "--in", "../../testdata/larkfield-refits.jsonl", "--out", events,
		"--rejected", rejected, "--category", "breakfast-cereal", "--particles", "16", "--seed", "7",
		"--time", "2026-11-30T06:00:00Z", "--quiet")
	if code != 0 {
		t.Fatalf("replay: exit %d: %s", code, stderr)
	}
	for _, f := range []struct{ got, golden string }{
		{events, "larkfield-refits.events.jsonl"},
		{rejected, "larkfield-refits.rejected.jsonl"},
	} {
		got, err := os.ReadFile(f.got)
		if err != nil {
			t.Fatal(err)
		}
		checkGolden(t, filepath.Join(goldenDir, f.golden), got)
	}
	checkCloudEvents(t, events)
}

// checkCloudEvents reads every line of an events file with the
// CloudEvents Go SDK, which validates it against the 1.0 specification,
// and checks that each carries a time and an absolute source.
func checkCloudEvents(t *testing.T, path string) {
	t.Helper()
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	for i, line := range bytes.Split(bytes.TrimSpace(raw), []byte("\n")) {
		var ev event.Event
		if err := json.Unmarshal(line, &ev); err != nil {
			t.Fatalf("line %d: SDK cannot read the event: %v", i+1, err)
		}
		if err := ev.Validate(); err != nil {
			t.Errorf("line %d: SDK refuses the event: %v", i+1, err)
		}
		if ev.Time().IsZero() || !strings.HasPrefix(ev.Source(), "urn:rivalmix:") ||
			!strings.HasPrefix(ev.Type(), "com.example.rivalmix.") {
			t.Errorf("line %d: time %v, source %q, type %q", i+1, ev.Time(), ev.Source(), ev.Type())
		}
	}
}

// checkGolden compares got with the golden file at path, or rewrites the
// file with -update. A difference is shown as a line diff, -want +got.
func checkGolden(t *testing.T, path string, got []byte) {
	t.Helper()
	if *update {
		if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, got, 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run with -update to create it)", err)
	}
	if !bytes.Equal(got, want) {
		t.Errorf("%s differs (-want +got):\n%s", path, lineDiff(string(want), string(got), 40))
	}
}

// lineDiff returns a line diff of want and got from their longest common
// subsequence: "-" lines only in want, "+" lines only in got, at most
// limit of them.
func lineDiff(want, got string, limit int) string {
	a, b := strings.Split(want, "\n"), strings.Split(got, "\n")
	// lcs[i][j] is the LCS length of a[i:] and b[j:].
	lcs := make([][]int32, len(a)+1)
	for i := range lcs {
		lcs[i] = make([]int32, len(b)+1)
	}
	for i := len(a) - 1; i >= 0; i-- {
		for j := len(b) - 1; j >= 0; j-- {
			if a[i] == b[j] {
				lcs[i][j] = lcs[i+1][j+1] + 1
			} else {
				lcs[i][j] = max(lcs[i+1][j], lcs[i][j+1])
			}
		}
	}
	var out strings.Builder
	n := 0
	emit := func(sign string, line string, at int) {
		if n < limit {
			fmt.Fprintf(&out, "%s%d: %s\n", sign, at+1, line)
		}
		n++
	}
	i, j := 0, 0
	for i < len(a) || j < len(b) {
		switch {
		case i < len(a) && j < len(b) && a[i] == b[j]:
			i, j = i+1, j+1
		case i < len(a) && (j == len(b) || lcs[i+1][j] >= lcs[i][j+1]):
			emit("-", a[i], i)
			i++
		default:
			emit("+", b[j], j)
			j++
		}
	}
	if n > limit {
		fmt.Fprintf(&out, "... and %d more differing lines\n", n-limit)
	}
	return out.String()
}

func TestLineDiff(t *testing.T) {
	t.Parallel()
	got := lineDiff("a\nb\nc\nd", "a\nc\nd\ne", 10)
	if want := "-2: b\n+4: e\n"; got != want {
		t.Errorf("lineDiff = %q, want %q", got, want)
	}
	if got := lineDiff("x\ny\nz", "1\n2\n3", 2); !strings.Contains(got, "... and 4 more differing lines") {
		t.Errorf("limited lineDiff = %q", got)
	}
}

// TestReplayPosterior: replay --posterior writes, after the last refit,
// a file with exactly the fields of fit's posterior.json, over the
// products of that refit (the fixture's last refit withdraws one product
// of the category), with the N x N matrix when --similarity is given; and
// an input with several categories needs --category.
func TestReplayPosterior(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	post, fitOut := filepath.Join(dir, "posterior.json"), filepath.Join(dir, "fit.json")
	code, _, stderr := runLine(t, "replay", "--in", "../../testdata/larkfield-refits.jsonl", "--out", filepath.Join(dir, "events.jsonl"),
		"--category", "breakfast-cereal", "--particles", "16", "--seed", "7", "--time", "2026-11-30T06:00:00Z", "--quiet",
		"--posterior", post, "--similarity")
	if code != 0 {
		t.Fatalf("replay: exit %d: %s", code, stderr)
	}
	code, _, stderr = runLine(t, "fit", "--in", "../../testdata/larkfield-cereal.jsonl", "--out", fitOut, "--quiet",
		"--sweeps", "40", "--burn", "10", "--thin", "2", "--similarity")
	if code != 0 {
		t.Fatalf("fit: exit %d: %s", code, stderr)
	}
	keys := func(path string) (string, map[string]json.RawMessage) {
		raw, err := os.ReadFile(path)
		if err != nil {
			t.Fatal(err)
		}
		var m map[string]json.RawMessage
		if err := json.Unmarshal(raw, &m); err != nil {
			t.Fatal(err)
		}
		return strings.Join(slices.Sorted(maps.Keys(m)), " "), m
	}
	gotKeys, got := keys(post)
	wantKeys, _ := keys(fitOut)
	if gotKeys != wantKeys {
		t.Errorf("replay --posterior fields %q, fit's %q", gotKeys, wantKeys)
	}
	var p posteriorFile
	raw, _ := os.ReadFile(post)
	if err := json.Unmarshal(raw, &p); err != nil {
		t.Fatal(err)
	}
	if p.Category != "breakfast-cereal" || len(p.Products) == 0 || len(p.Segments) != len(p.Products) || len(p.Similarity) != len(p.Products) {
		t.Errorf("category %q, %d products, %d segments, %d similarity rows", p.Category, len(p.Products), len(p.Segments), len(p.Similarity))
	}
	if _, ok := got["similarity"]; !ok {
		t.Error("no similarity matrix with --similarity")
	}
	code, _, stderr = runLine(t, "replay", "--in", "../../testdata/larkfield-refits.jsonl", "--out", filepath.Join(dir, "e2.jsonl"),
		"--particles", "16", "--quiet", "--posterior", filepath.Join(dir, "p2.json"))
	if code == 0 || !strings.Contains(stderr, "--category") {
		t.Errorf("several categories without --category: exit %d, stderr %q; want a refusal naming --category", code, stderr)
	}
}
