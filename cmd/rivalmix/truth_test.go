package main

import (
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
)

// TestSimulateTruthReplay: simulate writes a truth file beside its output
// with one line per refit and the planted moves at the middle refit;
// replay --truth scores the replayed moves against it and prints the
// per-refit table and the totals; a truth file with a switched product
// that has no segment is refused naming the product.
func TestSimulateTruthReplay(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	sim := filepath.Join(dir, "sim.jsonl")
	if code, _, stderr := runLine(t, "simulate", "--out", sim, "--products", "60", "--refits", "4", "--sim-seed", "3"); code != 0 {
		t.Fatalf("simulate: exit %d: %s", code, stderr)
	}
	truth := filepath.Join(dir, "sim.truth.jsonl")
	tr, err := readTruth(truth)
	if err != nil {
		t.Fatal(err)
	}
	lines := tr["breakfast-cereal"]
	if len(lines) != 4 {
		t.Fatalf("truth file has %d refits, want 4", len(lines))
	}
	for refit, l := range lines {
		want := 0
		if refit == "2026-W42" { // refit index 2 = refits/2
			want = 6 // 10% of 60
		}
		if len(l.Switched) != want || len(l.Segment) != 60 {
			t.Errorf("%s: %d switched, %d segments; want %d and 60", refit, len(l.Switched), len(l.Segment), want)
		}
	}
	code, stdout, stderr := runLine(t, "replay", "--in", sim, "--out", filepath.Join(dir, "ev.jsonl"), "--category", "breakfast-cereal",
		"--particles", "16", "--seed", "5", "--truth", truth, "--move-rule", "filter")
	if code != 0 {
		t.Fatalf("replay: exit %d: %s", code, stderr)
	}
	m := regexp.MustCompile(`precision ([0-9.]+) \((\d+) right of (\d+) moves.*recall ([0-9.]+) \((\d+) of (\d+) visible planted moves, 6 planted\).*false moves ([0-9.]+) per product`).FindStringSubmatch(stdout)
	if m == nil || !strings.Contains(stdout, "move rule filter") || strings.Count(stdout, "breakfast-cereal  2026-W4") < 8 {
		t.Fatalf("replay --truth output lacks the backtest:\n%s", stdout)
	}
	for _, v := range []string{m[1], m[4], m[7]} {
		if f, err := strconv.ParseFloat(v, 64); err != nil || f < 0 || f > 1 {
			t.Errorf("rate %q out of [0, 1]", v)
		}
	}

	bad := filepath.Join(dir, "bad.truth.jsonl")
	os.WriteFile(bad, []byte(`{"category":"c","refit":"r","segment":{"a":0},"switched":["b"]}`+"\n"), 0o644)
	if _, err := readTruth(bad); err == nil || !strings.Contains(err.Error(), `"b"`) {
		t.Errorf("bad truth: err = %v, want the product named", err)
	}
}
