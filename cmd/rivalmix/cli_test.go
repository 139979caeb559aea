package main

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"testing"

	"rivalmix/stream/category"
)

// runLine runs a command line as main does and returns the exit status
// and what it printed.
func runLine(t *testing.T, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	code = run(context.Background(), args, &out, &errb)
	return code, out.String(), errb.String()
}

// wantUsageError checks a command line that cannot run: exit status 2,
// the error on the first line of stderr, a one-line hint to -h on the
// second, and nothing else (no usage text).
func wantUsageError(t *testing.T, cmd string, args []string, msg ...string) {
	t.Helper()
	code, stdout, stderr := runLine(t, args...)
	lines := strings.Split(strings.TrimSuffix(stderr, "\n"), "\n")
	hint := "Run 'rivalmix " + cmd + " -h' for its flags."
	if cmd == "" {
		hint = "Run 'rivalmix -h' for the commands."
	}
	if code != 2 || stdout != "" || len(lines) != 2 || !strings.HasPrefix(lines[0], "rivalmix: ") || lines[1] != hint {
		t.Errorf("%q: exit %d, stdout %q, stderr:\n%s\nwant exit 2, the error then %q", args, code, stdout, stderr, hint)
		return
	}
	for _, m := range msg {
		if !strings.Contains(lines[0], m) {
			t.Errorf("%q: error %q lacks %q", args, lines[0], m)
		}
	}
}

// TestStrayArguments: a value given without its flag is refused, not
// silently ignored (inspect foo.db used to open rivalmix.db).
func TestStrayArguments(t *testing.T) {
	t.Parallel()
	wantUsageError(t, "inspect", []string{"inspect", "foo.db"}, `unexpected argument "foo.db"`, "--state FILE")
	wantUsageError(t, "serve", []string{"serve", "--http-addr", "", "extra-arg"}, `unexpected argument "extra-arg"`)
	wantUsageError(t, "fit", []string{"fit", "--in", "x.jsonl", "--out", "p.json", "more"}, `unexpected argument "more"`)
	wantUsageError(t, "version", []string{"version", "now"}, `unexpected argument "now"`)
}

// TestErrorFirstThenHint: a mistake prints the error and one line
// pointing to -h, not the whole usage; -h still prints the usage.
func TestErrorFirstThenHint(t *testing.T) {
	t.Parallel()
	wantUsageError(t, "fit", []string{"fit", "--bogus"}, "fit: flag provided but not defined: -bogus")
	wantUsageError(t, "fit", []string{"fit"}, "--in and --out are required")
	wantUsageError(t, "simulate", []string{"simulate"}, "exactly one of --out and --nats")
	wantUsageError(t, "", []string{"frobnicate"}, `unknown command "frobnicate"`)
	code, _, stderr := runLine(t, "fit", "-h")
	if code != 0 || !strings.Contains(stderr, "usage: rivalmix fit") || !strings.Contains(stderr, "-threshold") {
		t.Errorf("fit -h: exit %d, stderr %q", code, stderr)
	}
}

// TestTypedFlagErrors: a value of the wrong type says what was wanted, on
// the command line and in the environment, naming the variable and flag.
func TestTypedFlagErrors(t *testing.T) {
	wantUsageError(t, "fit", []string{"fit", "--sweeps", "many"}, `invalid value "many" for flag -sweeps: want a whole number`)
	wantUsageError(t, "fit", []string{"fit", "--threshold", "high"}, "want a number")
	wantUsageError(t, "serve", []string{"serve", "--fetch-wait", "5"}, "want a duration with its unit")
	t.Setenv("RIVALMIX_PARTICLES", "abc")
	wantUsageError(t, "serve", []string{"serve", "--http-addr", ""},
		`environment variable RIVALMIX_PARTICLES="abc" (it sets --particles): want a whole number`)
}

// TestSettingsFileErrors: mistakes in the YAML settings are reported with
// the line, the key path in the file and the keys allowed, not Go types.
func TestSettingsFileErrors(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	for _, tc := range []struct {
		yaml string
		want []string
	}{
		{"defaults:\n  partcles: 64\n", []string{`line 2: defaults: unknown key "partcles"; the keys are alert_probability,`, "particles"}},
		{"categories:\n  breakfast-cereal:\n    particles: many\n", []string{`line 3: categories.breakfast-cereal.particles: want a whole number, got "many"`}},
		{"categories:\n  breakfast-cereal:\n    threshold: [1]\n", []string{"line 3: categories.breakfast-cereal.threshold: want a number"}},
		{"defaults:\n  alpha_prior: {shape: 1, scale: 2}\n", []string{`defaults.alpha_prior: unknown key "scale"; the keys are shape and rate`}},
		{"categories:\n  breakfast cereal:\n    particles: 64\n", []string{`"breakfast cereal" is not a category name`}},
		{"default:\n  particles: 64\n", []string{`line 1: unknown key "default"; the file has the keys defaults and categories`}},
		{"categories:\n  breakfast-cereal:\n    competitors: 0\n", []string{"categories.breakfast-cereal: ", "want 1..1000 candidate competitors"}},
	} {
		path := filepath.Join(dir, "settings.yaml")
		if err := os.WriteFile(path, []byte(tc.yaml), 0o644); err != nil {
			t.Fatal(err)
		}
		_, _, err := loadSettings(path, category.DefaultWorkerConfig())
		if err == nil {
			t.Errorf("%q accepted", tc.yaml)
			continue
		}
		if strings.Contains(err.Error(), "main.") || strings.Contains(err.Error(), "modelSettings") {
			t.Errorf("%q: error speaks Go: %v", tc.yaml, err)
		}
		for _, w := range tc.want {
			if !strings.Contains(err.Error(), w) {
				t.Errorf("%q: error %q lacks %q", tc.yaml, err, w)
			}
		}
	}
}

// TestFitChecksOutputFirst: an output that cannot be written fails before
// the fit runs, not after it.
func TestFitChecksOutputFirst(t *testing.T) {
	t.Parallel()
	missing := filepath.Join(t.TempDir(), "no-such-dir", "p.json")
	code, stdout, stderr := runLine(t, "fit", "--in", "../../testdata/larkfield-cereal.jsonl", "--out", missing, "--sweeps", "3000")
	if code != 1 || !strings.Contains(stderr, "fit: --out: cannot write "+missing) {
		t.Errorf("exit %d, stderr %q; want the --out error", code, stderr)
	}
	if strings.Contains(stderr, "sampling") || stdout != "" {
		t.Errorf("the fit ran before the output was checked:\n%s", stderr)
	}
	if code, _, stderr := runLine(t, "fit", "--in", "../../testdata/larkfield-cereal.jsonl", "--out", t.TempDir()); code != 1 || !strings.Contains(stderr, "is a directory") {
		t.Errorf("--out DIR: exit %d, stderr %q", code, stderr)
	}
}

// TestFitQuiet: --quiet prints nothing at all when the fit succeeds.
func TestFitQuiet(t *testing.T) {
	t.Parallel()
	out := filepath.Join(t.TempDir(), "p.json")
	code, stdout, stderr := runLine(t, "fit", "--in", "../../testdata/larkfield-cereal.jsonl", "--out", out, "--quiet",
		"--sweeps", "20", "--burn", "5", "--thin", "1")
	if code != 0 || stdout != "" || stderr != "" {
		t.Errorf("--quiet: exit %d, stdout %q, stderr %q; want silence", code, stdout, stderr)
	}
	if _, err := os.Stat(out); err != nil {
		t.Errorf("no posterior written: %v", err)
	}
}

// TestVersion: "rivalmix version" and "rivalmix --version" print the
// build information.
func TestVersion(t *testing.T) {
	t.Parallel()
	for _, args := range [][]string{{"version"}, {"--version"}} {
		code, stdout, stderr := runLine(t, args...)
		if code != 0 || stderr != "" || !strings.HasPrefix(stdout, "rivalmix ") || !strings.Contains(stdout, runtime.Version()) {
			t.Errorf("%q: exit %d, stdout %q, stderr %q", args, code, stdout, stderr)
		}
	}
}

// TestFitRejectedFile: fit --rejected keeps every bad line with its
// reason, and a line that is not JSON gets a reason a person can act on.
func TestFitRejectedFile(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	in := filepath.Join(dir, "in.jsonl")
	body := `{"product":"P-1","refit":"W1","relative":[0.5,0.2]}
product=P-2
{"product":"P-3","refit":"W1","relative":[0.4,"x"]}
{"product":"P-4","refit":"W1","relative":[0.3]}
`
	if err := os.WriteFile(in, []byte(body), 0o644); err != nil {
		t.Fatal(err)
	}
	rej := filepath.Join(dir, "rejected.jsonl")
	code, _, stderr := runLine(t, "fit", "--in", in, "--out", filepath.Join(dir, "p.json"), "--rejected", rej,
		"--sweeps", "20", "--burn", "5", "--thin", "1")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	raw, err := os.ReadFile(rej)
	if err != nil {
		t.Fatal(err)
	}
	type rejected struct {
		Line   int    `json:"line"`
		Reason string `json:"reason"`
		Raw    string `json:"raw"`
	}
	var got []rejected
	for _, l := range strings.Split(strings.TrimSpace(string(raw)), "\n") {
		var r rejected
		if err := json.Unmarshal([]byte(l), &r); err != nil {
			t.Fatalf("rejected file line %q: %v", l, err)
		}
		got = append(got, r)
	}
	if len(got) != 2 || got[0].Line != 2 || got[1].Line != 3 {
		t.Fatalf("rejected file:\n%s\nwant lines 2 and 3", raw)
	}
	if got[0].Raw != "product=P-2" || !strings.Contains(got[1].Reason, `relative[1]`) {
		t.Errorf("rejected file lacks the raw line or the field:\n%s", raw)
	}
	if r := got[0].Reason; !strings.Contains(r, `not valid JSON: unexpected 'p' at byte 1`) || !strings.Contains(r, `{"product":"P-1042"`) ||
		strings.Contains(r, "invalid character") {
		t.Errorf("reason for a line that is not JSON: %q", r)
	}
}
