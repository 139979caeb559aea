package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"
)

// lockedBuffer is a bytes.Buffer the demo writes to while the test reads.
type lockedBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *lockedBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *lockedBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// smallDemo returns the flags of a small demo and its number of refits:
// 40 products, 3 refits, 64 particles; under -short (the race detector
// slows the demo about sixfold) 24 products, 2 refits, 32 particles.
func smallDemo() ([]string, int) {
	if testing.Short() {
		return []string{"--products", "24", "--refits", "2", "--particles", "32"}, 2
	}
	return []string{"--products", "40", "--refits", "3", "--particles", "64"}, 3
}

func TestDemoHolds(t *testing.T) {
	t.Parallel()
	pr, pw, err := os.Pipe()
	if err != nil {
		t.Fatal(err)
	}
	defer pr.Close()
	defer pw.Close()
	devNull, err := os.OpenFile(os.DevNull, os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer devNull.Close()
	file, err := os.Create(filepath.Join(t.TempDir(), "out.txt"))
	if err != nil {
		t.Fatal(err)
	}
	defer file.Close()
	for _, tt := range []struct {
		name       string
		hold, exit bool
		stdout     io.Writer
		want       bool
	}{
		{"buffer", false, false, &bytes.Buffer{}, false},
		{"pipe", false, false, pw, false},
		// /dev/null is a character device like a terminal; it must not
		// make the demo wait for a Ctrl-C nobody can press.
		{"dev null", false, false, devNull, false},
		{"regular file", false, false, file, false},
		{"pipe with --hold", true, false, pw, true},
		{"buffer with --hold", true, false, &bytes.Buffer{}, true},
		{"buffer with --exit", false, true, &bytes.Buffer{}, false},
	} {
		got, err := demoHolds(tt.hold, tt.exit, tt.stdout)
		if err != nil || got != tt.want {
			t.Errorf("%s: demoHolds = %v, %v; want %v", tt.name, got, err, tt.want)
		}
	}
	if _, err := demoHolds(true, true, &bytes.Buffer{}); err == nil || !strings.Contains(err.Error(), "--hold and --exit") {
		t.Errorf("--hold with --exit: error %v, want one naming both flags", err)
	}
	wantUsageError(t, "demo", []string{"demo", "--hold", "--exit"}, "--hold and --exit")
}

// TestDemoExitsWithoutTerminal runs the demo as CI does, its output not
// a terminal: it must finish by itself and say why.
func TestDemoExitsWithoutTerminal(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	var out, errb bytes.Buffer
	args, _ := smallDemo()
	if err := runDemo(ctx, args, &out, &errb); err != nil {
		t.Fatalf("demo: %v\nstderr: %s", err, errb.String())
	}
	if ctx.Err() != nil {
		t.Fatal("demo returned only when the test's deadline passed")
	}
	if !strings.Contains(out.String(), "stopping after the last refit") {
		t.Errorf("output lacks the line saying the demo stops:\n%s", out.String())
	}
	if strings.Contains(out.String(), "until Ctrl-C") {
		t.Errorf("output says the demo holds:\n%s", out.String())
	}
}

// TestDemoHoldsAndServesMetrics runs the demo with --hold, scrapes its
// /metrics once the last refit is in, checks the build-info and
// active-alerts gauges against what the demo printed, runs promtool's
// metrics lint on the scrape and checks the Grafana dashboard against
// the scraped names, then stops the demo the way Ctrl-C does.
func TestDemoHoldsAndServesMetrics(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	runCtx, interrupt := context.WithCancel(ctx)
	defer interrupt()
	var out, errb lockedBuffer
	args, refits := smallDemo()
	done := make(chan error, 1)
	go func() { done <- runDemo(runCtx, append([]string{"--hold"}, args...), &out, &errb) }()

	holdLine := regexp.MustCompile(`dashboard up at (http://\S+/) until Ctrl-C`)
	var base string
	for base == "" {
		select {
		case err := <-done:
			t.Fatalf("demo returned before holding: %v\nstdout: %s\nstderr: %s", err, out.String(), errb.String())
		case <-ctx.Done():
			t.Fatalf("demo did not reach its holding line:\n%s", out.String())
		case <-time.After(50 * time.Millisecond):
		}
		if m := holdLine.FindStringSubmatch(out.String()); m != nil {
			base = m[1]
		}
	}
	// Still holding after a pause: it waits for the interrupt.
	select {
	case err := <-done:
		t.Fatalf("demo stopped without an interrupt: %v", err)
	case <-time.After(300 * time.Millisecond):
	}

	body := scrape(t, ctx, base+"metrics")
	samples := parseSamples(t, body)

	// rivalmix_build_info: 1, labelled with this binary's Go version.
	bi := samples["rivalmix_build_info"]
	if len(bi) != 1 || bi[0].value != 1 || !strings.Contains(bi[0].labels, `goversion="`+runtime.Version()+`"`) {
		t.Errorf("rivalmix_build_info samples %v, want one of value 1 with goversion=%q", bi, runtime.Version())
	}
	// rivalmix_active_alerts: the count the last refit's summary event
	// reported, which the demo prints as "(N active)".
	active := regexp.MustCompile(`refit (\S+): .* \((\d+) active\)`).FindAllStringSubmatch(out.String(), -1)
	if len(active) != refits {
		t.Fatalf("demo printed %d refit lines, want %d:\n%s", len(active), refits, out.String())
	}
	wantActive, _ := strconv.Atoi(active[len(active)-1][2])
	got := samples["rivalmix_active_alerts"]
	if len(got) != 1 || !strings.Contains(got[0].labels, `category="`) || got[0].value != float64(wantActive) {
		t.Errorf("rivalmix_active_alerts samples %v, want one of value %d (the last summary's active alerts)", got, wantActive)
	}
	t.Logf("alerts in force after the last refit: %d (gauge %v)", wantActive, got)
	// One refit-to-summary latency per refit.
	if c := samples["rivalmix_refit_latency_seconds_count"]; len(c) != 1 || c[0].value != float64(refits) {
		t.Errorf("rivalmix_refit_latency_seconds_count %v, want %d", c, refits)
	}

	t.Run("promtool", func(t *testing.T) { checkPromtool(t, body) })
	t.Run("grafana", func(t *testing.T) {
		checkGrafanaDashboard(t, filepath.Join("..", "..", "deploy", "grafana", "rivalmix.json"), samples)
	})

	interrupt()
	select {
	case err := <-done:
		if err != nil {
			t.Errorf("demo after interrupt: %v", err)
		}
	case <-ctx.Done():
		t.Fatal("demo did not stop after the interrupt")
	}
}

func scrape(t *testing.T, ctx context.Context, url string) string {
	t.Helper()
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, url, nil)
	if err != nil {
		t.Fatal(err)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatalf("GET %s: %v", url, err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil || resp.StatusCode != http.StatusOK {
		t.Fatalf("GET %s: status %d, %v", url, resp.StatusCode, err)
	}
	return string(b)
}

type sample struct {
	labels string
	value  float64
}

func (s sample) String() string { return fmt.Sprintf("{%s} %g", s.labels, s.value) }

// parseSamples reads the Prometheus text format: sample name => samples.
func parseSamples(t *testing.T, body string) map[string][]sample {
	t.Helper()
	out := map[string][]sample{}
	for _, line := range strings.Split(body, "\n") {
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		name, rest := line, ""
		if i := strings.IndexAny(line, "{ "); i >= 0 {
			name, rest = line[:i], line[i:]
		}
		var labels string
		if strings.HasPrefix(rest, "{") {
			j := strings.LastIndexByte(rest, '}')
			if j < 0 {
				t.Fatalf("metrics line %q: unclosed labels", line)
			}
			labels, rest = rest[1:j], rest[j+1:]
		}
		fields := strings.Fields(rest)
		if len(fields) == 0 {
			t.Fatalf("metrics line %q: no value", line)
		}
		v, err := strconv.ParseFloat(fields[0], 64)
		if err != nil {
			t.Fatalf("metrics line %q: value: %v", line, err)
		}
		out[name] = append(out[name], sample{labels, v})
	}
	return out
}

// checkPromtool runs `promtool check metrics` (Debian's prometheus
// package) on a scrape. It skips when promtool is missing, unless
// RIVALMIX_REQUIRE_PROMTOOL is set, as .ci/run sets it after installing
// the package.
func checkPromtool(t *testing.T, body string) {
	path, err := exec.LookPath("promtool")
	if err != nil {
		if os.Getenv("RIVALMIX_REQUIRE_PROMTOOL") != "" {
			t.Fatalf("promtool not found and RIVALMIX_REQUIRE_PROMTOOL is set: %v", err)
		}
		t.Skip("promtool not found; install Debian's prometheus package (apt-get install -y prometheus) to lint /metrics")
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	cmd := exec.CommandContext(ctx, path, "check", "metrics")
	cmd.Stdin = strings.NewReader(body)
	out, err := cmd.CombinedOutput()
	if err != nil {
		t.Errorf("promtool check metrics: %v\n%s", err, out)
	}
	if strings.TrimSpace(string(out)) != "" {
		t.Errorf("promtool check metrics complained:\n%s", out)
	}
}

// grafanaDashboard is the part of a Grafana dashboard JSON model that
// holds queries.
type grafanaDashboard struct {
	Title  string `json:"title"`
	Panels []struct {
		Title   string `json:"title"`
		Targets []struct {
			Expr string `json:"expr"`
		} `json:"targets"`
	} `json:"panels"`
	Templating struct {
		List []struct {
			Name  string `json:"name"`
			Query struct {
				Query string `json:"query"`
			} `json:"query"`
		} `json:"list"`
	} `json:"templating"`
}

// checkGrafanaDashboard checks that every metric a PromQL expression of
// the dashboard names is among the scraped samples, and that the
// dashboard covers what operators watch.
func checkGrafanaDashboard(t *testing.T, path string, samples map[string][]sample) {
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var d grafanaDashboard
	if err := json.Unmarshal(b, &d); err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	used := map[string]bool{}
	check := func(where, expr string) {
		names := promqlMetricNames(expr)
		if len(names) == 0 {
			t.Errorf("%s: expression %q names no metric", where, expr)
		}
		for _, n := range names {
			used[n] = true
			if _, ok := samples[n]; !ok {
				t.Errorf("%s: expression %q uses %s, which /metrics does not serve", where, expr, n)
			}
		}
	}
	if len(d.Panels) == 0 {
		t.Fatalf("%s: no panels", path)
	}
	for _, p := range d.Panels {
		if p.Title == "" || len(p.Targets) == 0 {
			t.Errorf("panel %q: want a title and at least one query", p.Title)
		}
		for _, tg := range p.Targets {
			check(fmt.Sprintf("panel %q", p.Title), tg.Expr)
		}
	}
	labelValues := regexp.MustCompile(`^label_values\(\s*([a-zA-Z_:][a-zA-Z0-9_:]*)\s*,\s*[a-zA-Z_]+\s*\)$`)
	for _, v := range d.Templating.List {
		m := labelValues.FindStringSubmatch(v.Query.Query)
		if m == nil {
			t.Errorf("variable %s: query %q is not label_values(metric, label)", v.Name, v.Query.Query)
			continue
		}
		check("variable "+v.Name, m[1])
	}
	for _, n := range []string{
		"rivalmix_messages_total", "rivalmix_commit_seconds_bucket", "rivalmix_refit_latency_seconds_bucket",
		"rivalmix_ess_ratio", "rivalmix_distinct_states_ratio", "rivalmix_surprise_mean", "rivalmix_rejected_total",
		"rivalmix_outbox_pending", "rivalmix_active_alerts", "rivalmix_build_info",
	} {
		if !used[n] {
			t.Errorf("no panel shows %s", n)
		}
	}
}

// promqlMetricNames returns the metric names a PromQL expression selects:
// identifiers that are not functions, keywords, label names inside
// braces or grouping lists, durations or Grafana variables.
func promqlMetricNames(expr string) []string {
	var b strings.Builder
	depth := 0
	inString := byte(0)
	for i := 0; i < len(expr); i++ {
		c := expr[i]
		switch {
		case inString != 0:
			if c == '\\' {
				i++
			} else if c == inString {
				inString = 0
			}
			continue
		case c == '"' || c == '\'' || c == '`':
			inString = c
			continue
		case c == '{' || c == '[':
			depth++
			continue
		case c == '}' || c == ']':
			depth--
			b.WriteByte(' ')
			continue
		}
		if depth == 0 {
			b.WriteByte(c)
		}
	}
	s := b.String()
	// Grouping lists: by (...), without (...), on (...), ignoring (...),
	// group_left (...), group_right (...).
	s = regexp.MustCompile(`\b(by|without|on|ignoring|group_left|group_right)\s*\([^)]*\)`).ReplaceAllString(s, " ")
	s = regexp.MustCompile(`\$\{?[A-Za-z_][A-Za-z0-9_]*\}?`).ReplaceAllString(s, " ")
	keywords := map[string]bool{"by": true, "without": true, "on": true, "ignoring": true, "group_left": true,
		"group_right": true, "bool": true, "and": true, "or": true, "unless": true, "offset": true,
		"inf": true, "nan": true}
	var names []string
	ident := regexp.MustCompile(`[A-Za-z_:][A-Za-z0-9_:]*`)
	for _, loc := range ident.FindAllStringIndex(s, -1) {
		if loc[0] > 0 && (s[loc[0]-1] >= '0' && s[loc[0]-1] <= '9' || s[loc[0]-1] == '.') {
			continue // the tail of a number such as 1e3
		}
		name := s[loc[0]:loc[1]]
		rest := strings.TrimLeft(s[loc[1]:], " \t\n")
		if strings.HasPrefix(rest, "(") || keywords[strings.ToLower(name)] {
			continue
		}
		if !slices.Contains(names, name) {
			names = append(names, name)
		}
	}
	return names
}

func TestPromqlMetricNames(t *testing.T) {
	t.Parallel()
	for _, tt := range []struct {
		expr string
		want []string
	}{
		{`rivalmix_ess_ratio{category=~"$category"}`, []string{"rivalmix_ess_ratio"}},
		{`histogram_quantile(0.99, sum by (le) (rate(rivalmix_commit_seconds_bucket[$__rate_interval])))`,
			[]string{"rivalmix_commit_seconds_bucket"}},
		{`sum by (reason) (rate(rivalmix_rejected_total{reason!="x{y}"}[5m])) * 60`, []string{"rivalmix_rejected_total"}},
		{`count by (version, goversion, revision) (rivalmix_build_info)`, []string{"rivalmix_build_info"}},
		{`a_total / on (instance) group_left (version) b_info offset 5m > bool 1e3`, []string{"a_total", "b_info"}},
		{`sum(rate(x_total[1m])) without (category) or vector(0)`, []string{"x_total"}},
	} {
		if got := promqlMetricNames(tt.expr); !slices.Equal(got, tt.want) {
			t.Errorf("promqlMetricNames(%q) = %v, want %v", tt.expr, got, tt.want)
		}
	}
}
