package stream

import (
	"bytes"
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"slices"
	"sort"
	"strconv"
	"strings"
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

// binaryKills overrides the number of SIGKILLs of TestServeBinaryKilled
// for the long torture run (DEVELOPERS.md):
//
//	go test ./stream/ -run TestServeBinaryKilled -v -timeout 60m -args -binary-kills 1000
var binaryKills = flag.Int("binary-kills", 0, "SIGKILLs of TestServeBinaryKilled (0: 12)")

// crashSeed picks the crash plans and the binary's kill instants; a second
// long run with another seed tries other points.
var crashSeed = flag.Uint64("crash-seed", 2026, "seed of TestServiceCrashSafety's crash plans and TestServeBinaryKilled's kill instants")

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
	// position is the input position committed in the state file.
	position uint64
	// summaries counts the refit summary events present, one per category
	// and refit that completed.
	summaries int
	// dupEvents counts the output stream's extra copies of event ids (0
	// when each is stored once).
	dupEvents int
}

// collectRun reads a finished run's state file and streams, and checks
// what holds for every run: the output stream holds every event id once,
// the rejected stream every rejected input once, every product has its
// category's last refit.
func collectRun(t *testing.T, ctx context.Context, js jetstream.JetStream, cfg ServiceConfig, path string, cats ...*testCategory) runResult {
	t.Helper()
	var r runResult
	r.snaps, r.recs = readState(t, path)
	r.position = readPosition(t, path)
	for _, c := range cats {
		checkLastRefit(t, r.recs, c.lastRefit(), c)
	}
	msgs, count := outputEvents(t, ctx, js, cfg.Bus.OutputStream)
	r.events = map[string][]byte{}
	for id, n := range count {
		if n != 1 {
			t.Errorf("%s: event %s stored %d times, want once", cfg.Bus.OutputStream, id, n)
			r.dupEvents += n - 1
		}
		r.events[id] = msgs[id].Data
	}
	for _, c := range cats {
		for i := range c.refits {
			if count[alerts.EventID(c.name, refitName(i), alerts.KindSummary, c.name)] > 0 {
				r.summaries++
			}
		}
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

// readPosition returns the input position committed in the state file.
func readPosition(t *testing.T, path string) uint64 {
	t.Helper()
	pos, _ := killedState(t, path)
	return pos
}

// compareRuns checks that a run with crashes ended where the
// uninterrupted run did: equal particle systems byte for byte, equal
// product records, the same event ids with the same bodies, and the same
// rejected inputs. It returns how many of these differ: categories whose
// particle system or product records differ, events missing, extra or
// with another body, and 1 for a different set of rejected inputs.
func compareRuns(t *testing.T, name string, got, want runResult) (differing int) {
	t.Helper()
	if len(got.snaps) != len(want.snaps) {
		t.Errorf("%s: %d categories, want %d", name, len(got.snaps), len(want.snaps))
		differing += max(0, len(got.snaps)-len(want.snaps))
	}
	for cat, w := range want.snaps {
		if g := got.snaps[cat]; !bytes.Equal(g, w) {
			t.Errorf("%s: category %s: encoded particle system differs from the uninterrupted run (%d bytes, want %d)",
				name, cat, len(g), len(w))
			differing++
		}
		if !reflect.DeepEqual(got.recs[cat], want.recs[cat]) {
			t.Errorf("%s: category %s: product records differ from the uninterrupted run", name, cat)
			differing++
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
			differing++
		case !bytes.Equal(g, w):
			t.Errorf("%s: event %s differs:\n got %s\nwant %s", name, id, g, w)
			differing++
		}
	}
	for id := range got.events {
		if _, ok := want.events[id]; !ok {
			t.Errorf("%s: event %s not published by the uninterrupted run", name, id)
			differing++
		}
	}
	if !reflect.DeepEqual(got.rejected, want.rejected) {
		t.Errorf("%s: rejected inputs %v, want %v", name, got.rejected, want.rejected)
		differing++
	}
	return differing
}

// lostInputs counts the input messages whose effect the uninterrupted run
// kept and got lacks: inputs past got's committed position, products
// whose last applied input differs, refit-complete messages without their
// summary event, and rejected inputs never filed.
func lostInputs(got, want runResult) int {
	n := 0
	if got.position < want.position {
		n += int(want.position - got.position)
	}
	for cat, ws := range want.recs {
		have := map[string]state.ProductRecord{}
		for _, r := range got.recs[cat] {
			have[r.Product] = r
		}
		for _, w := range ws {
			if g, ok := have[w.Product]; !ok || g.AppliedSeq != w.AppliedSeq || g.Refit != w.Refit || g.Hash != w.Hash {
				n++
			}
		}
	}
	n += max(0, want.summaries-got.summaries)
	for seq := range want.rejected {
		if got.rejected[seq] == 0 {
			n++
		}
	}
	return n
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
	total, lost, dupIDs, differing := 0, 0, 0, 0
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
		got := collectRun(t, ctx, js, cfg, path, cereal, tea)
		differing += compareRuns(t, tag, got, want)
		lost += lostInputs(got, want)
		dupIDs += got.dupEvents
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
	t.Logf("crash points tried: %d over %d scenarios of %d input messages (%v); %d distinct events each; %d events published again after a crash and dropped by the duplicate window",
		total, scenarios, last, stages, len(want.events), dups.Load())
	if total < scenarios {
		t.Errorf("only %d crash points fired in %d scenarios", total, scenarios)
	}
	if lost != 0 {
		t.Errorf("%d inputs lost", lost)
	}
	// The counts cover the scenarios run: a failing scenario stops the
	// loop.
	t.Logf("crash points %d: inputs lost %d, duplicate event ids stored %d, states differing from the uninterrupted run %d",
		total, lost, dupIDs, differing)
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
	cmd     *exec.Cmd
	stderr  *lockedWriter
	done    chan error
	started time.Time
}

func startServe(t *testing.T, bin string, args ...string) *serveProcess {
	t.Helper()
	p := &serveProcess{cmd: exec.Command(bin, append([]string{"serve"}, args...)...), stderr: &lockedWriter{}, done: make(chan error, 1)}
	p.cmd.Stderr = p.stderr
	p.cmd.Env = append(os.Environ(), "GOTRACEBACK=all")
	p.started = time.Now()
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
	"--fetch-wait", "50ms", "--log-level", "debug"}

const binaryModelYAML = "defaults:\n  build_burn: 20\n"

// waitAcked polls the consumer until its ack floor reaches seq while p
// runs. It reads only the consumer p created (the service re-creates it at
// every start), not one a killed process left behind.
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
		info := c.CachedInfo()
		if info.Created.Before(p.started) {
			continue // the consumer of an earlier process
		}
		if info.AckFloor.Stream >= seq && info.Delivered.Stream >= seq {
			return
		}
	}
}

// ackFloor returns the durable consumer's ack floor, 0 when there is no
// consumer.
func ackFloor(t *testing.T, ctx context.Context, js jetstream.JetStream, bus BusConfig) uint64 {
	t.Helper()
	c, err := js.Consumer(ctx, bus.InputStream, bus.Durable)
	if errors.Is(err, jetstream.ErrConsumerNotFound) {
		return 0
	}
	if err != nil {
		t.Fatalf("consumer %s: %v", bus.Durable, err)
	}
	return c.CachedInfo().AckFloor.Stream
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

// lastLogMessage returns the msg of the last line a process logged: where
// it was when it was killed.
func lastLogMessage(log string) string {
	lines := strings.Split(strings.TrimSpace(log), "\n")
	for i := len(lines) - 1; i >= 0; i-- {
		_, rest, ok := strings.Cut(lines[i], " msg=")
		if !ok {
			continue
		}
		if q, err := strconv.QuotedPrefix(rest); err == nil {
			if msg, err := strconv.Unquote(q); err == nil {
				return msg
			}
		}
		msg, _, _ := strings.Cut(rest, " ")
		return msg
	}
	return "(nothing logged)"
}

// killMode is how TestServeBinaryKilled picks the instant of a SIGKILL.
type killMode int

const (
	// killAfterDelay kills a random wall-clock delay after the process
	// starts, wherever it then is: start-up, a batch, a refit's end, an
	// outbox publish, or waiting for input.
	killAfterDelay killMode = iota
	// killAtAck kills once the consumer's ack floor reaches a random
	// product message of the refit.
	killAtAck
	// killAfterComplete lets the process catch up with the refit's
	// products, publishes the refit-complete messages and kills it a
	// random moment later, in the refit's end.
	killAfterComplete
)

func (m killMode) String() string { return [...]string{"delay", "ack", "complete"}[m] }

// binaryKill is one planned SIGKILL: in which refit, and whether after
// the refit's complete messages are published.
type binaryKill struct {
	refit     int
	completes bool
	mode      killMode
}

// planBinaryKills spreads kills over refits at random, a third of each
// mode. A refit's complete messages are published once, so a refit gets
// at most one killAfterComplete; one more becomes a killAfterDelay. The
// plan is in run order: by refit, then the kills during the products,
// then a killAfterComplete, then the rest.
func planBinaryKills(rng *rand.Rand, kills, refits int) []binaryKill {
	plan := make([]binaryKill, kills)
	for i := range plan {
		plan[i].mode = killMode(i % 3)
	}
	rng.Shuffle(kills, func(i, j int) { plan[i], plan[j] = plan[j], plan[i] })
	free := rng.Perm(refits) // refits without a killAfterComplete yet
	for i := range plan {
		k := &plan[i]
		k.refit = rng.IntN(refits)
		if k.mode == killAfterComplete && len(free) == 0 {
			k.mode = killAfterDelay
		}
		switch k.mode {
		case killAfterComplete:
			k.refit, free = free[0], free[1:]
			k.completes = true
		case killAfterDelay:
			k.completes = rng.IntN(2) == 0
		}
	}
	order := func(k binaryKill) int {
		switch {
		case !k.completes:
			return 0
		case k.mode == killAfterComplete:
			return 1
		}
		return 2
	}
	slices.SortStableFunc(plan, func(a, b binaryKill) int {
		return cmp.Or(cmp.Compare(a.refit, b.refit), cmp.Compare(order(a), order(b)))
	})
	return plan
}

// binaryKillDelay draws the wall-clock delay of a killAfterDelay: half
// of them below 80 ms, the process's start-up (exec, connect, restore,
// consumer: 40 to 70 ms on a quiet 2-core machine), the others below
// 400 ms, about what a restarted process needs to catch up with a refit's
// products, end its refits and publish its outbox.
func binaryKillDelay(rng *rand.Rand) time.Duration {
	if rng.IntN(2) == 0 {
		return time.Duration(rng.Int64N(int64(80 * time.Millisecond)))
	}
	return time.Duration(rng.Int64N(int64(400 * time.Millisecond)))
}

// killedState reads what a killed process left in its state file: the
// committed input position and the events still in the outbox.
func killedState(t *testing.T, path string) (position uint64, outbox int) {
	t.Helper()
	st, err := state.Open(path, state.Options{ReadOnly: true, Timeout: 5 * time.Second})
	if err != nil {
		t.Fatalf("state.Open %s: %v", path, err)
	}
	defer st.Close()
	pos, _, err := st.Position()
	if err != nil {
		t.Fatalf("Position of %s: %v", filepath.Base(path), err)
	}
	if outbox, err = st.OutboxLen(); err != nil {
		t.Fatalf("OutboxLen of %s: %v", filepath.Base(path), err)
	}
	return pos.StreamSeq, outbox
}

// binaryRefitInput returns refit r's messages for the binary test: the
// products with one bad message among them (so that rejections are
// killed over too), and the refit-complete messages.
func binaryRefitInput(rng *rand.Rand, r int, cats ...*testCategory) (products, completes []inputMsg) {
	for _, m := range refitMessages(r, cats...) {
		if bytes.Contains(m.data, []byte(`"complete":true`)) {
			completes = append(completes, m)
		} else {
			products = append(products, m)
		}
	}
	// Alternately a truncated message and one with more relative
	// elasticities than competitors, on a product of the refit.
	bad := products[rng.IntN(len(products))]
	var p struct {
		Product string `json:"product"`
	}
	if err := json.Unmarshal(bad.data, &p); err != nil || p.Product == "" {
		panic(fmt.Sprintf("stream: product message %s has no product: %v", bad.data, err))
	}
	bad.data = fmt.Appendf(nil, `{"product":%q,`, p.Product)
	if r%2 == 1 {
		bad.data = fmt.Appendf(nil, `{"product":%q,"refit":%q,"competitors":2,"relative":[0.5,0.4,0.3]}`, p.Product, refitName(r))
	}
	i := rng.IntN(len(products) + 1)
	products = slices.Insert(products, i, bad)
	return products, completes
}

// TestServeBinaryKilled runs the real binary as a child process against
// the test's NATS server and SIGKILLs it -binary-kills times (12 by
// default) at random instants while it works through simulated refits of
// two categories, about one refit per four kills: a random delay after a
// start, a random ack floor inside a refit's products, or just after a
// refit's complete messages arrive. Each time it restarts on the same
// state file; the last run finishes and is stopped by SIGTERM. It must end
// exactly where an uninterrupted in-process run ends: bit-identical
// particle systems and product records, the same events once each, the
// same rejected inputs once each.
func TestServeBinaryKilled(t *testing.T) {
	if testing.Short() {
		t.Skip("builds cmd/rivalmix and runs it as a child process; not with -short")
	}
	t.Parallel()
	kills := 12
	if *binaryKills > 0 {
		kills = *binaryKills
	}
	refits := max(2, (kills+3)/4)
	// A kill with its restart takes about 0.25 s on a 2-core machine
	// (300 kills over 75 refits in 75 s, with the reference run); 2 s
	// per kill leaves room for a heavily loaded one.
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second+time.Duration(kills)*2*time.Second)
	defer cancel()
	bin := buildBinary(t, ctx)
	e := startTestServer(t)
	_, js := connectTest(t, e.ClientURL())
	binCfg := binaryServiceConfig()
	// The binary updates the output stream to its default 2-minute
	// duplicate window at every start (CreateStreams), so a longer window
	// set here would not last. The window only has to span an event's
	// first publish and its republish after a kill, which is the rest of
	// one short-lived process and the start of the next, never the whole
	// run; an event stored twice fails collectRun.
	ensureStreams(t, ctx, js, binCfg)
	dir := t.TempDir()
	statePath := filepath.Join(dir, "rivalmix.db")
	yamlPath := filepath.Join(dir, "model.yaml")
	if err := os.WriteFile(yamlPath, []byte(binaryModelYAML), 0o600); err != nil {
		t.Fatal(err)
	}
	args := append([]string{"--nats", e.ClientURL(), "--state", statePath, "--config", yamlPath}, binaryServeFlags...)
	cereal := newTestCategoryRefits("breakfast-cereal", 40, 1001, 31, refits)
	tea := newTestCategoryRefits("tea", 24, 3001, 32, refits)
	rng := rand.New(rand.NewPCG(*crashSeed, 31))
	plan := planBinaryKills(rng, kills, refits)

	var last uint64 // the last input published so far
	modes := map[killMode]int{}
	lastLine := map[string]int{} // last log message of each killed process
	// What each kill interrupted, from its log and state file: start-up
	// (it had not logged "consuming"), published input not yet committed,
	// events not yet published, or neither (it was waiting for input).
	interrupted := map[string]int{}
	republished := 0
	var longest time.Duration
	killNow := func(p *serveProcess, mode killMode) {
		t.Helper()
		p.kill(t)
		longest = max(longest, time.Since(p.started))
		modes[mode]++
		log := p.stderr.String()
		lastLine[lastLogMessage(log)]++
		republished += strings.Count(log, `msg="event already in stream"`)
		pos, outbox := killedState(t, statePath)
		idle := true
		if !strings.Contains(log, "msg=consuming") {
			interrupted["start-up"]++
			idle = false
		}
		if pos < last {
			interrupted["input"]++
			idle = false
		}
		if outbox > 0 {
			interrupted["outbox"]++
			idle = false
		}
		if idle {
			interrupted["waiting"]++
		}
	}
	next := 0
	for r := range refits {
		products, completes := binaryRefitInput(rng, r, cereal, tea)
		firstP := last + 1
		lastP := publishInput(t, ctx, js, products)
		last = lastP
		published := false
		publishCompletes := func() {
			last = publishInput(t, ctx, js, completes)
			published = true
		}
		for ; next < len(plan) && plan[next].refit == r; next++ {
			k := plan[next]
			if k.completes && !published && k.mode != killAfterComplete {
				publishCompletes()
			}
			mode := k.mode
			if mode == killAtAck {
				lo := max(ackFloor(t, ctx, js, binCfg.Bus), firstP-1)
				if lo < lastP {
					p := startServe(t, bin, args...)
					waitAcked(t, ctx, js, binCfg.Bus, p, lo+1+rng.Uint64N(lastP-lo))
					killNow(p, mode)
					continue
				}
				// Earlier runs acked the refit's products already.
				mode = killAfterDelay
			}
			switch mode {
			case killAfterComplete:
				p := startServe(t, bin, args...)
				waitAcked(t, ctx, js, binCfg.Bus, p, lastP)
				publishCompletes()
				time.Sleep(time.Duration(rng.Int64N(int64(60 * time.Millisecond))))
				killNow(p, mode)
			case killAfterDelay:
				d := binaryKillDelay(rng)
				p := startServe(t, bin, args...)
				time.Sleep(d)
				killNow(p, mode)
			}
		}
		if !published {
			publishCompletes()
		}
	}

	// The last run finishes; SIGTERM stops it gracefully.
	p := startServe(t, bin, args...)
	waitAcked(t, ctx, js, binCfg.Bus, p, last)
	// Wait for the last refit's summaries. Once every input is acked they
	// follow within a second; if they have not come 10 s later, a
	// refit-complete message is lost, and the checks below count what
	// else is.
	var caughtUp time.Time
	for {
		_, count := outputEvents(t, ctx, js, binCfg.Bus.OutputStream)
		info := consumerInfo(t, ctx, js, binCfg.Bus)
		summaries := 0
		for _, c := range []*testCategory{cereal, tea} {
			summaries += count[alerts.EventID(c.name, c.lastRefit(), alerts.KindSummary, c.name)]
		}
		idle := info.NumAckPending == 0 && info.NumPending == 0
		if summaries == 2 && idle {
			break
		}
		switch {
		case !idle:
			caughtUp = time.Time{}
		case caughtUp.IsZero():
			caughtUp = time.Now()
		case time.Since(caughtUp) > 10*time.Second:
			t.Errorf("refit %s: %d of 2 summaries published 10 s after the last input was acked", cereal.lastRefit(), summaries)
		}
		if t.Failed() {
			break
		}
		select {
		case <-ctx.Done():
			t.Fatalf("refit %s summaries not published: %v", cereal.lastRefit(), ctx.Err())
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
	republished += strings.Count(p.stderr.String(), `msg="event already in stream"`)
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
	want := collectRun(t, ctx, js, refCfg, refPath, cereal, tea)
	if want.summaries != 2*refits || len(want.rejected) != refits {
		t.Fatalf("uninterrupted run: %d refit summaries and %d rejected inputs, want %d and %d",
			want.summaries, len(want.rejected), 2*refits, refits)
	}
	differing := compareRuns(t, "rivalmix serve", got, want)
	lost := lostInputs(got, want)
	if lost != 0 {
		t.Errorf("%d inputs lost", lost)
	}
	total := 0
	for _, n := range modes {
		total += n
	}
	if total != kills {
		t.Errorf("%d kills made, %d planned", total, kills)
	}
	t.Logf("SIGKILLs by how the instant was picked: %v; by what they interrupted: %v; by the killed process's last log line: %v; "+
		"longest killed process %s; %d input messages, %d distinct events; %d events published again after a kill and dropped by the duplicate window",
		modes, interrupted, lastLine, longest.Round(time.Millisecond), last, len(want.events), republished)
	t.Logf("crash points (SIGKILLs of rivalmix serve) %d over %d refits: inputs lost %d, duplicate event ids stored %d, states differing from the uninterrupted run %d",
		total, refits, lost, got.dupEvents, differing)
}
