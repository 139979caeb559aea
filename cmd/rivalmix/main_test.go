package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"
	"time"

	"rivalmix/alerts"
)

func execute(t *testing.T, args ...string) (string, string, error) {
	t.Helper()
	var out, errb bytes.Buffer
	err := dispatch(context.Background(), args, &out, &errb)
	return out.String(), errb.String(), err
}

// TestFitWritesContract checks that fit writes posterior.json with exactly
// the fields other tools read, for both methods, and that the demo file's
// products all get a segment.
func TestFitWritesContract(t *testing.T) {
	t.Parallel()
	for _, method := range []string{"gibbs", "particles"} {
		t.Run(method, func(t *testing.T) {
			t.Parallel()
			out := filepath.Join(t.TempDir(), "p.json")
			args := []string{"fit", "--in", "../../testdata/larkfield-cereal.jsonl", "--out", out,
				"--method", method, "--sweeps", "60", "--burn", "20", "--thin", "2", "--particles", "32", "--build-chains", "4", "--build-burn", "20", "--similarity"}
			stdout, _, err := execute(t, args...)
			if err != nil {
				t.Fatal(err)
			}
			if !strings.Contains(stdout, "segment") || !strings.Contains(stdout, "300 products") || !strings.Contains(stdout, "not pricing advice") {
				t.Errorf("table missing from stdout:\n%s", stdout)
			}
			raw, err := os.ReadFile(out)
			if err != nil {
				t.Fatal(err)
			}
			var fields map[string]json.RawMessage
			if err := json.Unmarshal(raw, &fields); err != nil {
				t.Fatal(err)
			}
			var keys []string
			for k := range fields {
				keys = append(keys, k)
			}
			sort.Strings(keys)
			want := "alpha_mean category next_value num_segments products segments similarity"
			if got := strings.Join(keys, " "); got != want {
				t.Errorf("posterior.json fields %q, want %q", got, want)
			}
			var p posteriorFile
			if err := json.Unmarshal(raw, &p); err != nil {
				t.Fatal(err)
			}
			if p.Category != "larkfield-cereal" || len(p.Products) != 300 || len(p.Segments) != 300 || len(p.Similarity) != 300 {
				t.Errorf("category %q, %d products, %d segments, %d similarity rows", p.Category, len(p.Products), len(p.Segments), len(p.Similarity))
			}
			sum := 0.0
			for _, pr := range p.NumSegments {
				sum += pr
			}
			if sum < 0.999 || sum > 1.001 {
				t.Errorf("num_segments sums to %v", sum)
			}
			for id, nv := range p.NextValue {
				if nv.PExceed < 0 || nv.PExceed > 1 || !(nv.Lo <= nv.Median && nv.Median <= nv.Hi) {
					t.Errorf("%s: next value %+v out of order", id, nv)
				}
			}
		})
	}
}

// TestFitBadLines: bad lines are skipped with their line number and field,
// and --strict stops at the first.
func TestFitBadLines(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	in := filepath.Join(dir, "in.jsonl")
	body := `{"product":"P-1","refit":"W1","relative":[0.5,0.2]}
{"product":"P-2","refit":"W1","relative":[0.4,"x"]}
{"product":"P-3","refit":"W1","own":1.5,"cross":[{"id":"P-1","value":0.3}]}
{"product":"P-4","refit":"W1","relative":[0.3]}
`
	if err := os.WriteFile(in, []byte(body), 0o644); err != nil {
		t.Fatal(err)
	}
	stdout, stderr, err := execute(t, "fit", "--in", in, "--out", filepath.Join(dir, "p.json"), "--sweeps", "20", "--burn", "5", "--thin", "1")
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(stderr, "line 2") || !strings.Contains(stderr, "relative[1]") || !strings.Contains(stderr, "line 3") || !strings.Contains(stderr, `"own"`) {
		t.Errorf("stderr does not name the lines and fields:\n%s", stderr)
	}
	if !strings.Contains(stdout, "2 products, 2 lines skipped") {
		t.Errorf("summary line wrong:\n%s", stdout)
	}
	_, _, err = execute(t, "fit", "--in", in, "--out", filepath.Join(dir, "q.json"), "--quiet", "--strict")
	if err == nil || !strings.Contains(err.Error(), "line 2") {
		t.Errorf("--strict: err = %v, want the first bad line", err)
	}
}

// TestReplayDeterministic: the same input and seed give a byte-identical
// events file, and the table has a row per refit.
func TestReplayDeterministic(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	in := filepath.Join(dir, "refits.jsonl")
	if _, _, err := execute(t, "simulate", "--out", in, "--products", "40", "--refits", "3", "--sim-seed", "5"); err != nil {
		t.Fatal(err)
	}
	var files []string
	var table string
	for k := 0; k < 2; k++ {
		out := filepath.Join(dir, "events"+string(rune('a'+k))+".jsonl")
		stdout, _, err := execute(t, "replay", "--in", in, "--out", out, "--particles", "16", "--seed", "3",
			"--category", "breakfast-cereal", "--time", "2026-11-30T06:00:00Z")
		if err != nil {
			t.Fatal(err)
		}
		files = append(files, out)
		table = stdout
	}
	a, _ := os.ReadFile(files[0])
	b, _ := os.ReadFile(files[1])
	if len(a) == 0 || !bytes.Equal(a, b) {
		t.Errorf("events files differ or are empty (%d and %d bytes)", len(a), len(b))
	}
	for _, w := range []string{"2026-W40", "2026-W41", "2026-W42"} {
		if !strings.Contains(table, w) {
			t.Errorf("table lacks refit %s:\n%s", w, table)
		}
	}
	for _, line := range bytes.Split(bytes.TrimSpace(a), []byte("\n")) {
		var ev struct {
			Specversion, ID, Source, Type string
		}
		if err := json.Unmarshal(line, &ev); err != nil || ev.Specversion != "1.0" || ev.ID == "" || ev.Type == "" {
			t.Fatalf("not a CloudEvent: %s (%v)", line, err)
		}
	}
}

// TestHelpAndUnknown: every command has help; unknown commands fail.
func TestHelpAndUnknown(t *testing.T) {
	t.Parallel()
	for _, c := range commands() {
		_, stderr, err := execute(t, c.name, "-h")
		if !errors.Is(err, flag.ErrHelp) || !strings.Contains(stderr, "usage: rivalmix "+c.name) {
			t.Errorf("%s -h: err %v, stderr %q", c.name, err, stderr)
		}
	}
	if _, _, err := execute(t, "frobnicate"); err == nil {
		t.Error("unknown command accepted")
	}
}

// TestSettingsFile: the YAML settings reach the category's worker config
// and unknown keys are refused.
func TestSettingsFile(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	good := filepath.Join(dir, "good.yaml")
	os.WriteFile(good, []byte("defaults:\n  particles: 64\ncategories:\n  cereal:\n    threshold: 0.3\n    resampler: residual\n    keep_ess: 0.8\n    batch_sweeps: 0\n    random_share: 1\n"), 0o644)
	f := serviceFlags{configFile: good, particles: 256, batch: 256, fetch: 256, fetchWait: 1, seed: 1, replicas: 1,
		events: alerts.DefaultCloudEventConfig()}
	sc, err := f.serviceConfig()
	if err != nil {
		t.Fatal(err)
	}
	if sc.Worker.Particles.Particles != 64 || sc.PerCategory["cereal"].Alerts.Threshold != 0.3 || sc.PerCategory["cereal"].Particles.Particles != 64 {
		t.Errorf("settings not applied: %+v", sc.PerCategory["cereal"])
	}
	if got, def := sc.PerCategory["cereal"].Particles.KeepESS, sc.Worker.Particles.KeepESS; got != 0.8 || def == 0.8 {
		t.Errorf("keep_ess: category %v, default %v; want 0.8 for the category only", got, def)
	}
	if got, def := sc.PerCategory["cereal"].Particles.Sweeps, sc.Worker.Particles.Sweeps; got != 0 || def == 0 {
		t.Errorf("batch_sweeps: category %v, default %v; want 0 for the category only", got, def)
	}
	if got, def := sc.PerCategory["cereal"].Particles.RandomShare, sc.Worker.Particles.RandomShare; got != 1 || def == 1 {
		t.Errorf("random_share: category %v, default %v; want 1 for the category only", got, def)
	}
	bad := filepath.Join(dir, "bad.yaml")
	os.WriteFile(bad, []byte("defaults:\n  particle: 64\n"), 0o644)
	f.configFile = bad
	if _, err := f.serviceConfig(); err == nil || !strings.Contains(err.Error(), "particle") {
		t.Errorf("unknown key: err = %v", err)
	}
	f.configFile = ""
	f.coSegmentLimit = -1
	if _, err := f.serviceConfig(); err == nil || !strings.Contains(err.Error(), "--cosegment-limit -1") {
		t.Errorf("negative co-segment limit: err = %v", err)
	}
	f.coSegmentLimit = 0
	// The output stream's duplicate window: taken from the flag, raised
	// to what takeovers need when partitioned, refused when negative.
	f.dupWindow = 24 * time.Hour
	if sc, err := f.serviceConfig(); err != nil || sc.Bus.DuplicateWindow != 24*time.Hour {
		t.Errorf("--duplicate-window 24h: window %v, err %v", sc.Bus.DuplicateWindow, err)
	}
	f.dupWindow, f.partitions, f.claimTTL = time.Minute, 6, time.Minute
	if sc, err := f.serviceConfig(); err != nil || sc.Bus.DuplicateWindow != 3*time.Minute {
		t.Errorf("--duplicate-window 1m with 6 partitions and a 1m claim TTL: window %v, err %v; want 3m", sc.Bus.DuplicateWindow, err)
	}
	f.dupWindow = -time.Second
	if _, err := f.serviceConfig(); err == nil || !strings.Contains(err.Error(), "--duplicate-window -1s") {
		t.Errorf("negative duplicate window: err = %v", err)
	}
}

// TestExampleSettingsFile loads testdata/larkfield-settings.yaml, the
// example README points to: every key it sets must reach the worker
// config (the values there are the defaults, so each is checked against
// what the file says, and the category's overrides against theirs), and a
// key an earlier release read names what replaced it.
func TestExampleSettingsFile(t *testing.T) {
	t.Parallel()
	f := serviceFlags{configFile: "../../testdata/larkfield-settings.yaml", particles: 999, batch: 999, fetch: 256, fetchWait: 1, seed: 1, replicas: 1,
		events: alerts.DefaultCloudEventConfig()}
	sc, err := f.serviceConfig()
	if err != nil {
		t.Fatal(err)
	}
	w, pc := sc.Worker, sc.Worker.Particles
	checks := []struct {
		key       string
		got, want float64
	}{
		{"particles", float64(pc.Particles), 256}, {"competitors", float64(w.Competitors), 10},
		{"batch_size", float64(w.BatchSize), 256}, {"threshold", w.Alerts.Threshold, 0.25},
		{"alert_probability", w.Alerts.AlertProb, 0.5}, {"move_in", w.Alerts.MoveIn, 0.6}, {"move_out", w.Alerts.MoveOut, 0.4},
		{"keep_ess", pc.KeepESS, 0.5}, {"split_merge", pc.SplitMerge, 0.5}, {"build_chains", float64(pc.BuildChains), 16},
		{"build_burn", float64(pc.BuildBurn), 150}, {"min_chains", float64(pc.MinChains), 16}, {"refit_burn", float64(pc.RefitBurn), 50},
		{"renew_below", pc.RenewBelow, 0.05}, {"diversity_floor", pc.DiversityFloor, 0.25},
		{"batch_sweeps", float64(pc.Sweeps), 2}, {"random_share", pc.RandomShare, 0.1}, {"ess_fraction", pc.ESSFraction, 0.5},
		{"alpha_prior.shape", pc.Prior.AlphaShape, 1}, {"alpha_prior.rate", pc.Prior.AlphaRate, 1},
	}
	for _, c := range checks {
		if c.got != c.want {
			t.Errorf("%s: %v, the file says %v", c.key, c.got, c.want)
		}
	}
	cereal := sc.PerCategory["breakfast-cereal"]
	if cereal.Alerts.Threshold != 0.3 || cereal.Summary.Threshold != 0.3 || cereal.Particles.Particles != 128 {
		t.Errorf("breakfast-cereal: threshold %v/%v, particles %d; the file says 0.3 and 128",
			cereal.Alerts.Threshold, cereal.Summary.Threshold, cereal.Particles.Particles)
	}
	old := filepath.Join(t.TempDir(), "old.yaml")
	if err := os.WriteFile(old, []byte("defaults:\n  refit_sweeps: 10\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	f.configFile = old
	if _, err := f.serviceConfig(); err == nil || !strings.Contains(err.Error(), "refit_sweeps was removed") || !strings.Contains(err.Error(), "min_chains") {
		t.Errorf("removed key: err = %v, want it named with what replaced it", err)
	}
}
