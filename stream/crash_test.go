package stream

import (
	"bytes"
	"context"
	"flag"
	"fmt"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"sort"
	"strconv"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/alerts"
	"rivalmix/state"
	"rivalmix/stream/input"
)

// crashScenarios overrides the number of scenarios of
// TestServiceCrashSafety for the long torture run (DEVELOPERS.md):
//
//	go test -run 'TestServiceCrashSafety$' -crash-scenarios 500 -timeout 0 -v ./stream/
//	go test -run 'TestServiceCrashSafety$' -crash-scenarios 250 -crash-seed 7 -timeout 0 -v ./stream/
var crashScenarios = flag.Int("crash-scenarios", 0, "scenarios of TestServiceCrashSafety (0: 30, or 5 with -short)")

// crashSeed picks the crash plans; a second long run with another seed
// tries other points.
var crashSeed = flag.Uint64("crash-seed", 2026, "seed of TestServiceCrashSafety's crash plans")

// crashStages are where a crash plan can stop a worker: the service's
// failpoints, and "published", after the output stream acknowledged an
// event but before the publisher deleted it from the outbox.
var crashStages = []string{"applied", "before-commit", "committed", "acking", "published"}

// crashPlan kills a worker at the at-th time it reaches stage. Once it
// fired the worker is dead: every later failpoint and publish fails, so
// nothing more is committed, acked or published.
type crashPlan struct {
	stage string
	at    int

	mu    sync.Mutex
	seen  map[string]int
	fired bool
	dead  chan struct{}
}

// randomCrashPlan picks a stage and an occurrence. The ranges reach past
// the end of a run of the crash test's input now and then; such a plan
// does not fire and the run finishes.
func randomCrashPlan(rng *rand.Rand) *crashPlan {
	p := &crashPlan{stage: crashStages[rng.IntN(len(crashStages))], seen: map[string]int{}, dead: make(chan struct{})}
	switch p.stage {
	case "applied":
		p.at = 1 + rng.IntN(120)
	case "published":
		p.at = 1 + rng.IntN(24)
	default:
		p.at = 1 + rng.IntN(16)
	}
	return p
}

// hit counts one arrival at stage and reports whether the worker is dead.
func (p *crashPlan) hit(stage string) bool {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.fired {
		return true
	}
	p.seen[stage]++
	if stage == p.stage && p.seen[stage] == p.at {
		p.fired = true
		close(p.dead)
	}
	return p.fired
}

// hasFired reports whether the plan killed the worker.
func (p *crashPlan) hasFired() bool {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.fired
}

func (p *crashPlan) failpoint(stage string) error {
	if p.hit(stage) {
		return fmt.Errorf("%w at %s #%d", errTestCrash, p.stage, p.at)
	}
	return nil
}

// options installs the plan; dups counts events the output stream
// acknowledged as duplicates.
func (p *crashPlan) options(dups *atomic.Int64) instanceOptions {
	return instanceOptions{
		failpoint: p.failpoint,
		publisher: func(next MsgPublisher) MsgPublisher {
			return &crashingPublisher{next: &dupCounter{next: next, n: dups}, plan: p}
		},
	}
}

// dupCounter counts publishes the stream acknowledged as duplicates.
type dupCounter struct {
	next MsgPublisher
	n    *atomic.Int64
}

func (d *dupCounter) PublishMsg(ctx context.Context, msg *nats.Msg, opts ...jetstream.PublishOpt) (*jetstream.PubAck, error) {
	ack, err := d.next.PublishMsg(ctx, msg, opts...)
	if err == nil && ack.Duplicate {
		d.n.Add(1)
	}
	return ack, err
}

// crashingPublisher publishes through next until the plan fires; the
// "published" stage fires after the stream acknowledged the event, so the
// entry stays in the outbox and is sent again after the restart.
type crashingPublisher struct {
	next MsgPublisher
	plan *crashPlan
}

func (c *crashingPublisher) PublishMsg(ctx context.Context, msg *nats.Msg, opts ...jetstream.PublishOpt) (*jetstream.PubAck, error) {
	select {
	case <-c.plan.dead:
		return nil, errTestCrash
	default:
	}
	ack, err := c.next.PublishMsg(ctx, msg, opts...)
	if err != nil {
		return nil, err
	}
	if c.plan.hit("published") {
		return nil, errTestCrash
	}
	return ack, nil
}

// crashInput is the crash test's input: two refits of two categories,
// with one bad message in each refit, so that rejections are crashed
// over too.
func crashInput(cereal, tea *testCategory) []inputMsg {
	r0 := refitMessages(0, cereal, tea)
	r1 := refitMessages(1, cereal, tea)
	bad0 := inputMsg{subject: input.DefaultInputPrefix + "." + cereal.name, data: []byte(`{"product":"P-1001",`)}
	bad1 := inputMsg{subject: input.DefaultInputPrefix + "." + tea.name,
		data: []byte(`{"product":"P-3001","refit":"2026-W41","competitors":2,"relative":[0.5,0.4,0.3]}`)}
	var in []inputMsg
	in = append(in, r0[:len(r0)/2]...)
	in = append(in, bad0)
	in = append(in, r0[len(r0)/2:]...)
	in = append(in, r1[:len(r1)/3]...)
	in = append(in, bad1)
	in = append(in, r1[len(r1)/3:]...)
	return in
}

// runResult is what a finished run left behind.
type runResult struct {
	snaps    map[string][]byte
	recs     map[string][]state.ProductRecord
	events   map[string][]byte // CloudEvent body by event id
	rejected map[string]int    // rejected input sequence => copies
}

// collectRun reads a finished run's state file and streams, and checks
// what holds for every run: the output stream holds every event id once,
// the rejected stream every rejected input once, every product has its
// last refit.
func collectRun(t *testing.T, ctx context.Context, js jetstream.JetStream, cfg ServiceConfig, path string, cats ...*testCategory) runResult {
	t.Helper()
	var r runResult
	r.snaps, r.recs = readState(t, path)
	checkLastRefit(t, r.recs, refitName(1), cats...)
	msgs, count := outputEvents(t, ctx, js, cfg.Bus.OutputStream)
	r.events = map[string][]byte{}
	for id, n := range count {
		if n != 1 {
			t.Errorf("%s: event %s stored %d times, want once", cfg.Bus.OutputStream, id, n)
		}
		r.events[id] = msgs[id].Data
	}
	r.rejected = map[string]int{}
	for _, m := range streamMessages(t, ctx, js, cfg.Bus.RejectedStream) {
		r.rejected[m.Header.Get(HeaderInputSeq)]++
	}
	for seq, n := range r.rejected {
		if n != 1 {
			t.Errorf("%s: input %s rejected %d times, want once", cfg.Bus.RejectedStream, seq, n)
		}
	}
	return r
}

// compareRuns checks that a run with crashes ended where the
// uninterrupted run did: equal particle systems byte for byte, equal
// product records, the same event ids with the same bodies, and the same
// rejected inputs.
func compareRuns(t *testing.T, name string, got, want runResult) {
	t.Helper()
	if len(got.snaps) != len(want.snaps) {
		t.Errorf("%s: %d categories, want %d", name, len(got.snaps), len(want.snaps))
	}
	for cat, w := range want.snaps {
		if g := got.snaps[cat]; !bytes.Equal(g, w) {
			t.Errorf("%s: category %s: encoded particle system differs from the uninterrupted run (%d bytes, want %d)",
				name, cat, len(g), len(w))
		}
		if !reflect.DeepEqual(got.recs[cat], want.recs[cat]) {
			t.Errorf("%s: category %s: product records differ from the uninterrupted run", name, cat)
		}
	}
	if len(got.events) != len(want.events) {
		t.Errorf("%s: %d distinct events, want %d", name, len(got.events), len(want.events))
	}
	for id, w := range want.events {
		g, ok := got.events[id]
		switch {
		case !ok:
			t.Errorf("%s: event %s missing", name, id)
		case !bytes.Equal(g, w):
			t.Errorf("%s: event %s differs:\n got %s\nwant %s", name, id, g, w)
		}
	}
	if !reflect.DeepEqual(got.rejected, want.rejected) {
		t.Errorf("%s: rejected inputs %v, want %v", name, got.rejected, want.rejected)
	}
}

// TestServiceCrashSafety stops the worker dead at random points (a
// failpoint of the service, or between an event's publish and its
// removal from the outbox), abandons it without any graceful step (no
// commit, no ack, connection closed, state file released; the NATS
// server keeps running), restarts on the same state file and finishes.
// Every run must end exactly where an uninterrupted run ends.
func TestServiceCrashSafety(t *testing.T) {
	t.Parallel()
	scenarios := 30
	if testing.Short() {
		scenarios = 5
	}
	if *crashScenarios > 0 {
		scenarios = *crashScenarios
	}
	// 170 s covers the 30 default scenarios with a wide margin on a
	// loaded 2-core machine; a longer run gets the same per scenario.
	ctx, cancel := context.WithTimeout(context.Background(), 170*time.Second*time.Duration(max(1, (scenarios+29)/30)))
	defer cancel()
	e := startTestServer(t)
	_, js := connectTest(t, e.ClientURL())
	base := testServiceConfig()
	ensureStreams(t, ctx, js, base)
	cereal := newTestCategory("breakfast-cereal", 40, 1001, 21)
	tea := newTestCategory("tea", 24, 3001, 22)
	last := publishInput(t, ctx, js, crashInput(cereal, tea))
	dir := t.TempDir()
	lg := newTestLog(t)

	refCfg := withTag(base, "ref")
	refPath := filepath.Join(dir, "ref.db")
	ref := startInstance(t, e.ClientURL(), refPath, refCfg, lg, instanceOptions{})
	if stopped, err := ref.waitDone(ctx, last, nil); stopped {
		t.Fatalf("uninterrupted run stopped: %v", err)
	}
	if err := ref.stop(); err != nil {
		t.Fatalf("uninterrupted run: %v", err)
	}
	want := collectRun(t, ctx, js, refCfg, refPath, cereal, tea)
	if len(want.rejected) != 2 {
		t.Fatalf("uninterrupted run rejected %d inputs, want 2", len(want.rejected))
	}

	rng := rand.New(rand.NewPCG(*crashSeed, 12))
	crashes := map[string]int{}
	total := 0
	var dups atomic.Int64
	for i := range scenarios {
		tag := fmt.Sprintf("c%02d", i)
		cfg := withTag(base, tag)
		path := filepath.Join(dir, tag+".db")
		planned := 1 + rng.IntN(3)
		for run := 0; ; run++ {
			if run > planned+2 {
				t.Fatalf("%s: did not finish after %d runs", tag, run)
			}
			var plan *crashPlan
			opt := instanceOptions{publisher: func(next MsgPublisher) MsgPublisher { return &dupCounter{next: next, n: &dups} }}
			var dead chan struct{}
			if run < planned {
				plan = randomCrashPlan(rng)
				opt, dead = plan.options(&dups), plan.dead
			}
			in := startInstance(t, e.ClientURL(), path, cfg, lg, opt)
			stopped, err := in.waitDone(ctx, last, dead)
			if plan != nil && plan.hasFired() {
				in.abandon()
				crashes[plan.stage]++
				total++
				continue
			}
			if stopped {
				t.Fatalf("%s run %d: service stopped: %v", tag, run, err)
			}
			// The plan's point lay past the end of the input.
			if err := in.stop(); err != nil {
				t.Fatalf("%s run %d: %v", tag, run, err)
			}
			break
		}
		compareRuns(t, tag, collectRun(t, ctx, js, cfg, path, cereal, tea), want)
		if t.Failed() {
			break
		}
		if *crashScenarios > 0 && (i+1)%25 == 0 {
			t.Logf("%d scenarios, %d crash points so far", i+1, total)
		}
	}
	stages := make([]string, 0, len(crashes))
	for s, n := range crashes {
		stages = append(stages, s+"="+strconv.Itoa(n))
	}
	sort.Strings(stages)
	if !t.Failed() {
		// Every scenario passed compareRuns and collectRun: no product
		// missing its last refit, no event missing or stored twice, no
		// state differing from the uninterrupted run.
		t.Logf("crash points %d: inputs lost 0, duplicate event ids stored 0, states differing from the uninterrupted run 0", total)
	}
	t.Logf("crash points tried: %d over %d scenarios of %d input messages (%v); %d distinct events each; %d events published again after a crash and dropped by the duplicate window",
		total, scenarios, last, stages, len(want.events), dups.Load())
	if total < scenarios {
		t.Errorf("only %d crash points fired in %d scenarios", total, scenarios)
	}
}

// buildBinary builds cmd/rivalmix into a temporary directory.
func buildBinary(t *testing.T, ctx context.Context) string {
	t.Helper()
	gobin, err := exec.LookPath("go")
	if err != nil {
		t.Fatalf("go tool not found: %v", err)
	}
	bin := filepath.Join(t.TempDir(), "rivalmix")
	cmd := exec.CommandContext(ctx, gobin, "build", "-o", bin, "./cmd/rivalmix")
	cmd.Dir = ".."
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("go build ./cmd/rivalmix: %v\n%s", err, out)
	}
	return bin
}

// serveProcess is a running `rivalmix serve`.
type serveProcess struct {
	cmd    *exec.Cmd
	stderr *lockedWriter
	done   chan error
}

func startServe(t *testing.T, bin string, args ...string) *serveProcess {
	t.Helper()
	p := &serveProcess{cmd: exec.Command(bin, append([]string{"serve"}, args...)...), stderr: &lockedWriter{}, done: make(chan error, 1)}
	p.cmd.Stderr = p.stderr
	p.cmd.Env = append(os.Environ(), "GOTRACEBACK=all")
	if err := p.cmd.Start(); err != nil {
		t.Fatalf("start rivalmix serve: %v", err)
	}
	go func() { p.done <- p.cmd.Wait() }()
	t.Cleanup(func() {
		select {
		case <-p.done:
		default:
			_ = p.cmd.Process.Kill()
			<-p.done
		}
		if t.Failed() {
			t.Logf("rivalmix serve (pid %d) stderr:\n%s", p.cmd.Process.Pid, p.stderr)
		}
	})
	return p
}

// lockedWriter lets the process's stderr be read while it is written.
type lockedWriter struct {
	mu sync.Mutex
	w  bytes.Buffer
}

func (l *lockedWriter) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.w.Write(p)
}

func (l *lockedWriter) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.w.String()
}

// binaryServiceConfig is the configuration `rivalmix serve` builds from
// binaryServeFlags and binaryModelYAML, for the in-process reference run.
func binaryServiceConfig() ServiceConfig {
	cfg := DefaultServiceConfig()
	cfg.Worker.Particles.Particles = 32
	cfg.Worker.Particles.BuildBurn = 20
	cfg.Worker.BatchSize = 16
	cfg.FetchSize = 8
	cfg.FetchWait = 50 * time.Millisecond
	cfg.Bus.MaxAckPending = 4 * cfg.FetchSize
	return cfg
}

var binaryServeFlags = []string{"--http-addr", "", "--particles", "32", "--batch", "16", "--fetch", "8",
	"--fetch-wait", "50ms", "--log-level", "info"}

const binaryModelYAML = "defaults:\n  build_burn: 20\n"

// waitAcked polls the consumer until its ack floor reaches seq while p
// runs.
func waitAcked(t *testing.T, ctx context.Context, js jetstream.JetStream, bus BusConfig, p *serveProcess, seq uint64) {
	t.Helper()
	for {
		select {
		case err := <-p.done:
			p.done <- err
			t.Fatalf("rivalmix serve exited early: %v", err)
		case <-ctx.Done():
			t.Fatalf("consumer did not ack input %d: %v", seq, ctx.Err())
		case <-time.After(2 * time.Millisecond):
		}
		c, err := js.Consumer(ctx, bus.InputStream, bus.Durable)
		if err != nil {
			continue // between a delete and a create at the process's start
		}
		if info := c.CachedInfo(); info.AckFloor.Stream >= seq && info.Delivered.Stream >= seq {
			return
		}
	}
}

// kill sends SIGKILL and waits for the process to end.
func (p *serveProcess) kill(t *testing.T) {
	t.Helper()
	if err := p.cmd.Process.Kill(); err != nil {
		t.Fatalf("kill: %v", err)
	}
	if err := <-p.done; err == nil {
		t.Fatalf("rivalmix serve exited cleanly before SIGKILL")
	}
	p.done <- nil
}

// TestServeBinaryKilled runs the real binary as a child process against
// the test's NATS server, SIGKILLs it three times while it works on the
// refits, restarts it on the same state file and checks that it ends
// exactly where an uninterrupted in-process run ends.
func TestServeBinaryKilled(t *testing.T) {
	if testing.Short() {
		t.Skip("builds cmd/rivalmix and runs it as a child process; not with -short")
	}
	t.Parallel()
	// The binary's output stream keeps its default 2-minute duplicate
	// window; the whole test stays inside it.
	ctx, cancel := context.WithTimeout(context.Background(), 110*time.Second)
	defer cancel()
	bin := buildBinary(t, ctx)
	e := startTestServer(t)
	_, js := connectTest(t, e.ClientURL())
	binCfg := binaryServiceConfig()
	ensureStreams(t, ctx, js, binCfg)
	dir := t.TempDir()
	statePath := filepath.Join(dir, "rivalmix.db")
	yamlPath := filepath.Join(dir, "model.yaml")
	if err := os.WriteFile(yamlPath, []byte(binaryModelYAML), 0o600); err != nil {
		t.Fatal(err)
	}
	args := append([]string{"--nats", e.ClientURL(), "--state", statePath, "--config", yamlPath}, binaryServeFlags...)
	cereal := newTestCategory("breakfast-cereal", 40, 1001, 31)
	tea := newTestCategory("tea", 24, 3001, 32)
	rng := rand.New(rand.NewPCG(2026, 31))
	// A kill point in (from, to]: the ack floor that triggers the kill.
	between := func(from, to uint64) uint64 { return from + 1 + rng.Uint64N(to-from) }

	// Refit 1: killed while it is being applied.
	last0 := publishInput(t, ctx, js, refitMessages(0, cereal, tea))
	p := startServe(t, bin, args...)
	k := between(0, last0-1)
	waitAcked(t, ctx, js, binCfg.Bus, p, k)
	p.kill(t)
	kills := []string{fmt.Sprintf("refit 1 after ack %d of %d", k, last0)}
	p = startServe(t, bin, args...)
	waitAcked(t, ctx, js, binCfg.Bus, p, last0)

	// Refit 2: killed while its products are applied, then again just
	// after its refit-complete messages arrive.
	var products, completes []inputMsg
	for _, m := range refitMessages(1, cereal, tea) {
		if bytes.Contains(m.data, []byte(`"complete":true`)) {
			completes = append(completes, m)
		} else {
			products = append(products, m)
		}
	}
	lastP := publishInput(t, ctx, js, products)
	k = between(last0, lastP-1)
	waitAcked(t, ctx, js, binCfg.Bus, p, k)
	p.kill(t)
	kills = append(kills, fmt.Sprintf("refit 2 after ack %d of %d..%d", k, last0+1, lastP))
	p = startServe(t, bin, args...)
	waitAcked(t, ctx, js, binCfg.Bus, p, lastP)
	last := publishInput(t, ctx, js, completes)
	delay := time.Duration(rng.IntN(40)) * time.Millisecond
	time.Sleep(delay)
	p.kill(t)
	kills = append(kills, fmt.Sprintf("refit 2 %s after its refit-complete messages", delay))

	// The last run finishes; SIGTERM stops it gracefully.
	p = startServe(t, bin, args...)
	waitAcked(t, ctx, js, binCfg.Bus, p, last)
	for {
		_, count := outputEvents(t, ctx, js, binCfg.Bus.OutputStream)
		info := consumerInfo(t, ctx, js, binCfg.Bus)
		summaries := 0
		for id := range count {
			for _, c := range []*testCategory{cereal, tea} {
				if id == alerts.EventID(c.name, refitName(1), alerts.KindSummary, c.name) {
					summaries++
				}
			}
		}
		if summaries == 2 && info.NumAckPending == 0 && info.NumPending == 0 {
			break
		}
		select {
		case <-ctx.Done():
			t.Fatalf("refit 2 summaries not published: %v", ctx.Err())
		case <-time.After(20 * time.Millisecond):
		}
	}
	if err := p.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatalf("SIGTERM: %v", err)
	}
	select {
	case err := <-p.done:
		p.done <- err
		if err != nil {
			t.Fatalf("rivalmix serve after SIGTERM: %v", err)
		}
	case <-ctx.Done():
		t.Fatalf("rivalmix serve did not stop on SIGTERM: %v", ctx.Err())
	}
	got := collectRun(t, ctx, js, binCfg, statePath, cereal, tea)

	refCfg := withTag(binCfg, "ref")
	refPath := filepath.Join(dir, "ref.db")
	ref := startInstance(t, e.ClientURL(), refPath, refCfg, newTestLog(t), instanceOptions{})
	if stopped, err := ref.waitDone(ctx, last, nil); stopped {
		t.Fatalf("uninterrupted run stopped: %v", err)
	}
	if err := ref.stop(); err != nil {
		t.Fatalf("uninterrupted run: %v", err)
	}
	compareRuns(t, "rivalmix serve", got, collectRun(t, ctx, js, refCfg, refPath, cereal, tea))
	t.Logf("SIGKILLed rivalmix serve %d times: %v", len(kills), kills)
}
