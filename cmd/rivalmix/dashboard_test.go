package main

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/cdproto/log"
	"github.com/chromedp/cdproto/network"
	"github.com/chromedp/cdproto/runtime"
	"github.com/chromedp/chromedp"
	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/stream/category"
	"rivalmix/stream/read"
)

// chromiumPath returns the Chromium binary, or "" when none is installed.
func chromiumPath() string {
	for _, name := range []string{"chromium", "chromium-browser", "google-chrome", "headless_shell"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if _, err := os.Stat("/usr/bin/chromium"); err == nil {
		return "/usr/bin/chromium"
	}
	return ""
}

// pageFigure is what the browser reports of one <figure>.
type pageFigure struct {
	ID         string `json:"id"`
	Declared   int    `json:"declared"`
	Series     int    `json:"series"`
	SVG        int    `json:"svg"`
	AxisLabels int    `json:"axisLabels"`
	Caption    string `json:"caption"`
	Reported   int    `json:"reported"`
	Threshold  int    `json:"threshold"`
}

const figuresJS = `Array.from(document.querySelectorAll('figure')).map(f => ({
  id: f.id, declared: +f.dataset.series, series: f.querySelectorAll('svg .series').length,
  svg: f.querySelectorAll('svg').length, axisLabels: f.querySelectorAll('svg .axis-label').length,
  caption: (f.querySelector('figcaption') || {textContent: ''}).textContent,
  reported: f.querySelectorAll('svg circle.reported').length,
  threshold: f.querySelectorAll('svg line.threshold').length}))`

func tableJS(id string) string {
	return `Array.from(document.querySelectorAll('#` + id + ` tbody tr')).map(r => Array.from(r.cells).map(c => c.textContent.trim()))`
}

// TestDashboardInBrowser starts the service as serve does (embedded NATS
// server, bbolt state file, HTTP on loopback), feeds it a simulated
// category through JetStream, and loads every dashboard page in headless
// Chromium: no console errors, no request leaving loopback, each figure
// an SVG with the expected number of series, axis labels and a caption,
// the moves and alerts tables holding the rows of the read API in the
// same order, and table sorting working. A screenshot of each page is
// written under the test's temp dir (or RIVALMIX_SCREENSHOTS when set).
func TestDashboardInBrowser(t *testing.T) {
	chrome := chromiumPath()
	if chrome == "" {
		t.Skip("no Chromium binary found (apt-get install -y chromium): the browser test cannot run")
	}
	products, refits := 120, 4
	if testing.Short() {
		products, refits = 80, 4
	}
	dir := t.TempDir()
	shots := os.Getenv("RIVALMIX_SCREENSHOTS")
	if shots == "" {
		shots = filepath.Join(dir, "screenshots")
	}
	if err := os.MkdirAll(shots, 0o755); err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()

	// The service, as serve starts it.
	var f serviceFlags
	fs := flag.NewFlagSet("serve", flag.ContinueOnError)
	f.register(fs, filepath.Join(dir, "rivalmix.db"), "127.0.0.1:-1")
	f.httpAddr, f.particles, f.logLevel = "127.0.0.1:0", 48, "error"
	sc, err := f.serviceConfig()
	if err != nil {
		t.Fatal(err)
	}
	r, err := start(ctx, &f, sc, slog.New(slog.DiscardHandler))
	if err != nil {
		t.Fatal(err)
	}
	defer r.close()
	runCtx, stopRun := context.WithCancel(ctx)
	runDone := make(chan error, 1)
	go func() { runDone <- r.run(runCtx) }()
	defer func() {
		stopRun()
		if err := <-runDone; err != nil {
			t.Errorf("service: %v", err)
		}
	}()
	base := strings.TrimSuffix(httpURL(r), "/")

	// A simulated category through JetStream.
	sim := simulation{category: "breakfast-cereal", products: products, refits: refits, switchShare: 0.15, seed: 7, firstWeek: 40}
	events, err := r.js.OrderedConsumer(ctx, sc.Bus.OutputStream, jetstream.OrderedConsumerConfig{
		FilterSubjects: []string{sc.Bus.OutputPrefix() + "." + sim.category + ".>"}})
	if err != nil {
		t.Fatal(err)
	}
	kinds := map[string]int{}
	var last string
	err = sim.each(func(refit string, msgs [][]byte) error {
		if err := publishPaced(ctx, r.js, sc.Bus.InputPrefix()+"."+sim.category, msgs, 0); err != nil {
			return err
		}
		_, _, err := waitSummary(ctx, events, refit, kinds, time.Minute)
		last = refit
		return err
	})
	if err != nil {
		t.Fatal(err)
	}
	client := &http.Client{Timeout: 10 * time.Second}
	getJSON := func(path string, v any) {
		t.Helper()
		resp, err := client.Get(base + path)
		if err != nil {
			t.Fatalf("GET %s: %v", path, err)
		}
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		if resp.StatusCode != 200 || json.Unmarshal(b, v) != nil {
			t.Fatalf("GET %s: %d %s", path, resp.StatusCode, b)
		}
	}
	catPath := "/v1/categories/" + sim.category
	var segs read.SegmentsResponse
	for deadline := time.Now().Add(30 * time.Second); ; {
		getJSON(catPath+"/segments", &segs)
		if segs.Refit == last || time.Now().After(deadline) {
			break
		}
		time.Sleep(100 * time.Millisecond)
	}
	if segs.Refit != last {
		t.Fatalf("read API shows refit %s, want %s", segs.Refit, last)
	}
	var moves read.MovesResponse
	var alertsResp read.AlertsResponse
	getJSON(catPath+"/moves", &moves)
	getJSON(catPath+"/alerts", &alertsResp)
	t.Logf("%d products, %d refits: %d segments, %d moves, %d active alerts; events %v",
		products, refits, len(segs.Segments), len(moves.Moves), len(alertsResp.Alerts), kinds)
	if len(moves.Moves) == 0 || len(alertsResp.Alerts) == 0 {
		t.Fatalf("the simulated category gave %d moves and %d alerts: the tables are not exercised", len(moves.Moves), len(alertsResp.Alerts))
	}

	// The browser.
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(chrome), chromedp.Flag("headless", true), chromedp.NoSandbox, chromedp.DisableGPU,
		chromedp.Flag("disable-quic", true), chromedp.NoFirstRun, chromedp.NoDefaultBrowserCheck,
		chromedp.Flag("disable-background-networking", true), chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true), chromedp.Flag("disable-dev-shm-usage", true),
		chromedp.UserDataDir(filepath.Join(dir, "chromium-profile")), chromedp.WindowSize(1280, 1000),
	}
	actx, acancel := chromedp.NewExecAllocator(ctx, opts...)
	defer acancel()
	var mu sync.Mutex
	var problems, requests []string
	bctx, bcancel := chromedp.NewContext(actx, chromedp.WithListener(func(ev any) {
		mu.Lock()
		defer mu.Unlock()
		switch ev := ev.(type) {
		case *runtime.EventConsoleAPICalled:
			if ev.Type == runtime.ConsoleAPICalledTypeError || ev.Type == runtime.ConsoleAPICalledTypeAssert {
				problems = append(problems, "console "+string(ev.Type))
			}
		case *runtime.EventExceptionThrown:
			problems = append(problems, "exception: "+ev.ExceptionDetails.Text)
		case *log.EventEntryAdded:
			if ev.Entry.Level == log.EntryLevelError {
				problems = append(problems, "log: "+ev.Entry.Text+" "+ev.Entry.URL)
			}
		case *network.EventRequestWillBeSent:
			requests = append(requests, ev.Request.URL)
		}
	}))
	defer bcancel()

	load := func(path, shot string) {
		t.Helper()
		mu.Lock()
		problems = nil
		mu.Unlock()
		if err := chromedp.Do(bctx, chromedp.Navigate(base+path)); err != nil {
			t.Fatalf("load %s: %v", path, err)
		}
		png, err := chromedp.Run(bctx, chromedp.FullScreenshot(100))
		if err != nil {
			t.Fatalf("screenshot %s: %v", path, err)
		}
		file := filepath.Join(shots, shot+".png")
		if err := os.WriteFile(file, png, 0o644); err != nil {
			t.Fatal(err)
		}
		caution, err := chromedp.Run(bctx, chromedp.Evaluate[string](`document.getElementById('caution').textContent`))
		if err != nil || !strings.Contains(caution, "not pricing advice") {
			t.Errorf("%s: caution line %q (%v)", path, caution, err)
		}
		mu.Lock()
		defer mu.Unlock()
		if len(problems) > 0 {
			t.Errorf("%s: console errors %q", path, problems)
		}
		t.Logf("%s: screenshot %s (%d bytes)", path, file, len(png))
	}
	figuresOf := func(path string) map[string]pageFigure {
		t.Helper()
		figs, err := chromedp.Run(bctx, chromedp.Evaluate[[]pageFigure](figuresJS))
		if err != nil {
			t.Fatalf("%s: figures: %v", path, err)
		}
		out := map[string]pageFigure{}
		for _, f := range figs {
			if f.SVG != 1 || f.Series != f.Declared || f.Series < 1 || strings.TrimSpace(f.Caption) == "" {
				t.Errorf("%s: figure %s: %d svg, %d series drawn of %d declared, caption %q", path, f.ID, f.SVG, f.Series, f.Declared, f.Caption)
			}
			if f.AxisLabels < 2 {
				t.Errorf("%s: figure %s has %d axis labels", path, f.ID, f.AxisLabels)
			}
			out[f.ID] = f
		}
		return out
	}
	rows := func(id string) [][]string {
		t.Helper()
		rs, err := chromedp.Run(bctx, chromedp.Evaluate[[][]string](tableJS(id)))
		if err != nil {
			t.Fatalf("table %s: %v", id, err)
		}
		return rs
	}

	// Front page: the summary line counts segments (it once printed them).
	load("/", "index")
	summary, err := chromedp.Run(bctx, chromedp.Evaluate[string](`document.querySelector('.summary').textContent`))
	if err != nil || !strings.Contains(summary, fmt.Sprintf("%d products · %d segments", products, len(segs.Segments))) || strings.Contains(summary, "{") {
		t.Errorf("front page summary %q (%v)", summary, err)
	}

	// Category page.
	catPage := "/categories/" + url.PathEscape(sim.category)
	load(catPage, "category")
	figs := figuresOf(catPage)
	k := len(segs.Segments)
	sizesSeries := map[string]bool{}
	want := map[string]int{"decay": k, "membership": k, "cosegment": 1, "ess": 1, "distinct": 1, "surprise": 1}
	for id, n := range want {
		if figs[id].Series != n {
			t.Errorf("figure %s: %d series, want %d", id, figs[id].Series, n)
		}
	}
	names, err := chromedp.Run(bctx, chromedp.Evaluate[[]string](`Array.from(document.querySelectorAll('#sizes .series')).map(g => g.dataset.series)`))
	if err != nil {
		t.Fatal(err)
	}
	for _, n := range names {
		sizesSeries[n] = true
	}
	for _, s := range segs.Segments {
		if !sizesSeries[s.ID] {
			t.Errorf("sizes timeline lacks segment %s (series %v)", s.ID, names)
		}
	}
	if !sizesSeries["moves"] {
		t.Errorf("sizes timeline lacks the moves bars (series %v)", names)
	}
	moveRows := rows("moves")
	if len(moveRows) != len(moves.Moves) {
		t.Errorf("moves table has %d rows, the read API %d", len(moveRows), len(moves.Moves))
	}
	for i := range min(len(moveRows), len(moves.Moves)) {
		m := moves.Moves[i]
		if got := moveRows[i]; got[0] != m.Product || got[1] != m.From || got[2] != m.To || got[5] != m.Refit {
			t.Errorf("moves row %d = %v, read API %+v", i, got, m)
		}
	}
	alertRows := rows("alerts")
	if len(alertRows) != len(alertsResp.Alerts) {
		t.Errorf("alerts table has %d rows, the read API %d", len(alertRows), len(alertsResp.Alerts))
	}
	var ids []string
	for i, row := range alertRows {
		ids = append(ids, row[0])
		if i < len(alertsResp.Alerts) && row[0] != alertsResp.Alerts[i].Product {
			t.Errorf("alerts row %d is %s, read API %s", i, row[0], alertsResp.Alerts[i].Product)
		}
	}
	if !slices.IsSortedFunc(ids, category.CompareIDs) {
		t.Errorf("alert products not in reading order: %v", ids)
	}
	// Sorting: the product column twice gives the reverse reading order.
	if _, err := chromedp.Run(bctx, chromedp.Evaluate[[]byte](`(() => { const th = document.querySelector('#alerts th'); th.click(); th.click(); return 0; })()`)); err != nil {
		t.Fatal(err)
	}
	sorted := rows("alerts")
	if len(sorted) > 1 && (sorted[0][0] != ids[len(ids)-1] || sorted[len(sorted)-1][0] != ids[0]) {
		t.Errorf("sorting the alerts by product twice gave %s .. %s, want %s .. %s",
			sorted[0][0], sorted[len(sorted)-1][0], ids[len(ids)-1], ids[0])
	}

	// Product pages: a moved product and an alerted one.
	for _, p := range []string{moves.Moves[0].Product, alertsResp.Alerts[0].Product} {
		path := catPage + "/products/" + url.PathEscape(p)
		load(path, "product-"+p)
		var pv category.ProductView
		getJSON(catPath+"/products/"+url.PathEscape(p), &pv)
		pf := figuresOf(path)
		fid := "product-" + p
		if d := pf[fid+"-decay"]; d.Series != 1 || pv.Last == nil || d.Reported != len(pv.Last.Relative) {
			t.Errorf("%s: decay figure %+v for %d reported values", p, d, len(pv.Last.Relative))
		}
		if m := pf[fid+"-membership"]; m.Series < 1 {
			t.Errorf("%s: membership over refits has %d series", p, m.Series)
		}
		if pv.Next.Defined {
			if n := pf[fid+"-next"]; n.Series != 1 || n.Threshold != 1 {
				t.Errorf("%s: predictive figure %+v", p, n)
			}
		}
	}

	// Nothing left loopback.
	mu.Lock()
	defer mu.Unlock()
	for _, u := range requests {
		pu, err := url.Parse(u)
		if err != nil || (pu.Scheme != "data" && pu.Hostname() != "127.0.0.1") {
			t.Errorf("page requested %s", u)
		}
	}
}
