package main

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"os"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/sequential/synth"
	"rivalmix/stream"
)

// simulation describes the fictional category's run of weekly refits.
type simulation struct {
	category    string
	products    int
	refits      int
	switchShare float64
	seed        uint64
	firstWeek   int
	// truth, when set, receives each refit's planted truth.
	truth func(truthRefit)
}

func (s *simulation) register(fs interface {
	StringVar(*string, string, string, string)
	IntVar(*int, string, int, string)
	Float64Var(*float64, string, float64, string)
	Uint64Var(*uint64, string, uint64, string)
}, products, refits int) {
	fs.StringVar(&s.category, "category", synth.Scenario().Category, "category name (the last token of the input subject)")
	fs.IntVar(&s.products, "products", products, "products in the category")
	fs.IntVar(&s.refits, "refits", refits, "number of weekly refits")
	fs.Float64Var(&s.switchShare, "switch", 0.1, "share of products that move to another segment for good at the middle refit")
	fs.Uint64Var(&s.seed, "sim-seed", 1, "random seed of the simulated data")
	fs.IntVar(&s.firstWeek, "week", 40, "ISO week number of the first refit (refit ids are 2026-Www)")
}

func (s *simulation) validate() error {
	if s.products < 1 || s.refits < 1 || s.switchShare < 0 || s.switchShare > 1 {
		return errors.New("--products and --refits must be >= 1 and --switch in [0, 1]")
	}
	if s.firstWeek < 1 || s.firstWeek+s.refits-1 > 99 {
		return errors.New("--week plus --refits must stay within 1..99")
	}
	return nil
}

// each calls fn for every refit with its id and input messages, the
// refit-complete control message last.
func (s *simulation) each(fn func(refit string, msgs [][]byte) error) error {
	cfg := synth.Scenario()
	cfg.Category = s.category
	cfg.Products = s.products
	src := rand.New(rand.NewPCG(s.seed, 0x51))
	seq := synth.NewSequence(cfg, s.refits, s.switchShare, src)
	for r := 0; r < s.refits; r++ {
		refit := fmt.Sprintf("2026-W%02d", s.firstWeek+r)
		ps := seq.Refit(r)
		msgs := make([][]byte, 0, len(ps)+1)
		for i := range ps {
			msgs = append(msgs, ps[i].MessageJSON(refit))
		}
		msgs = append(msgs, []byte(fmt.Sprintf(`{"refit":%q,"complete":true,"expected":%d}`, refit, len(ps))))
		if s.truth != nil {
			tr := truthRefit{Category: s.category, Refit: refit, Segment: make(map[string]int, len(ps))}
			for i := range ps {
				tr.Segment[ps[i].ID] = ps[i].Segment
				if r == seq.SwitchAt && seq.Switched[i] {
					tr.Switched = append(tr.Switched, ps[i].ID)
				}
			}
			s.truth(tr)
		}
		if err := fn(refit, msgs); err != nil {
			return err
		}
	}
	return nil
}

// runSimulate writes the refits to a file or publishes them on NATS.
func runSimulate(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("simulate", "(--out FILE | --nats URL) [flags]",
		"Writes or publishes weekly refit results of a fictional category (Larkfield Grocers, breakfast\n"+
			"cereals: an invented retailer) drawn from the model with known segments; a share of products\n"+
			"switches segment at the middle refit. Each refit ends with a refit-complete control message.\n"+
			"With --out FILE the true segments and planted moves go to FILE's truth file (FILE without\n"+
			".jsonl, plus .truth.jsonl) for replay --truth.", stderr)
	var s simulation
	s.register(fs, 300, 1)
	out := fs.String("out", "", "output file (JSON lines); - for stdout")
	natsURL := fs.String("nats", "", "publish to this NATS server's JetStream instead (subjects rivalmix.in.<category>)")
	rate := fs.Float64("rate", 0, "with --nats: messages per second (0 = as fast as acknowledged)")
	var conn stream.ConnectOptions
	connFlags(fs, &conn)
	envUsage(fs)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if err := applyEnv(fs); err != nil {
		return err
	}
	if (*out == "") == (*natsURL == "") {
		return usageErrorf(fs, "give exactly one of --out and --nats")
	}
	if err := s.validate(); err != nil {
		return usageErrorf(fs, "%v", err)
	}
	if err := conn.Validate(); err != nil {
		return usageErrorf(fs, "%v", err)
	}
	if *natsURL != "" {
		lg, _ := newLogger("warn", os.Stderr)
		conn.Name = "rivalmix-simulate"
		nc, err := stream.Connect(ctx, *natsURL, conn, lg)
		if err != nil {
			return fmt.Errorf("simulate: %w", err)
		}
		defer nc.Close()
		js, err := jetstream.New(nc)
		if err != nil {
			return fmt.Errorf("simulate: %w", err)
		}
		subject := stream.DefaultBusConfig().InputPrefix() + "." + s.category
		return s.each(func(refit string, msgs [][]byte) error {
			t0 := time.Now()
			if err := publishPaced(ctx, js, subject, msgs, *rate); err != nil {
				return fmt.Errorf("simulate: refit %s: %w", refit, err)
			}
			fmt.Fprintf(stderr, "published refit %s: %d messages to %s in %.1fs\n", refit, len(msgs), subject, time.Since(t0).Seconds())
			return nil
		})
	}
	var w io.Writer = stdout
	if *out != "-" {
		f, err := os.Create(*out)
		if err != nil {
			return fmt.Errorf("simulate: %w", err)
		}
		defer f.Close()
		w = f
	}
	var truthLines []truthRefit
	if *out != "-" {
		s.truth = func(tr truthRefit) { truthLines = append(truthLines, tr) }
	}
	bw := bufio.NewWriter(w)
	err := s.each(func(refit string, msgs [][]byte) error {
		for _, m := range msgs {
			bw.Write(m)
			bw.WriteByte('\n')
		}
		return ctx.Err()
	})
	if err != nil {
		return fmt.Errorf("simulate: %w", err)
	}
	if err := bw.Flush(); err != nil {
		return fmt.Errorf("simulate: write %s: %w", *out, err)
	}
	if *out != "-" {
		tp := truthPath(*out)
		if err := writeTruth(tp, truthLines); err != nil {
			return fmt.Errorf("simulate: %w", err)
		}
		fmt.Fprintf(stderr, "wrote %d refits of %d products to %s, planted segments and moves to %s\n", s.refits, s.products, *out, tp)
	}
	return nil
}

// publishPaced publishes msgs to subject, each acknowledged by the stream,
// at most rate per second when rate > 0. Publishes are pipelined in
// windows of 256 outstanding acks.
func publishPaced(ctx context.Context, js jetstream.JetStream, subject string, msgs [][]byte, rate float64) error {
	const window = 256
	var pending []jetstream.PubAckFuture
	wait := func() error {
		for _, f := range pending {
			select {
			case <-f.Ok():
			case err := <-f.Err():
				return err
			case <-ctx.Done():
				return ctx.Err()
			}
		}
		pending = pending[:0]
		return nil
	}
	start := time.Now()
	for i, m := range msgs {
		if rate > 0 {
			due := start.Add(time.Duration(float64(i) / rate * float64(time.Second)))
			if d := time.Until(due); d > 0 {
				if !stream.Sleep(ctx, d) {
					return ctx.Err()
				}
			}
		}
		f, err := js.PublishAsync(subject, m)
		if err != nil {
			return err
		}
		pending = append(pending, f)
		if len(pending) >= window {
			if err := wait(); err != nil {
				return err
			}
		}
	}
	return wait()
}
