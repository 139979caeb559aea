package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/alerts"
	"rivalmix/stream/read"
)

// runDemo runs everything in one process with no setup: an embedded NATS
// server, a temporary state file, the service and the simulator.
func runDemo(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("demo", "[flags]",
		"Runs the whole service with no setup: an embedded NATS server, a temporary state file, the\n"+
			"streaming worker and a simulator publishing weekly refits of a fictional category (Larkfield\n"+
			"Grocers' breakfast cereals, an invented retailer). Prints the HTTP address of the dashboard,\n"+
			"metrics and read API, a line per refit, then the segments, moves and alerts. When stdout is a\n"+
			"terminal it then keeps the dashboard up until Ctrl-C; piped (as under CI) it stops.", stderr)
	var f serviceFlags
	f.register(fs, "", "127.0.0.1:-1")
	var s simulation
	s.register(fs, 200, 4)
	hold := fs.Bool("hold", false, "keep the dashboard up after the last refit until Ctrl-C, even when stdout is not a terminal")
	exit := fs.Bool("exit", false, "stop after the last refit, even when stdout is a terminal")
	keep := fs.Bool("keep", false, "keep the temporary state directory instead of deleting it")
	timeout := fs.Duration("refit-timeout", 5*time.Minute, "longest wait for one refit's summary event")
	fs.Lookup("particles").DefValue = "128"
	f.particles = 128
	fs.Lookup("http-addr").DefValue = "127.0.0.1:0"
	f.httpAddr = "127.0.0.1:0"
	fs.Lookup("log-level").DefValue = "warn"
	f.logLevel = "warn"
	envUsage(fs)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if err := applyEnv(fs); err != nil {
		return err
	}
	if err := s.validate(); err != nil {
		return usageErrorf(fs, "%v", err)
	}
	holding, err := demoHolds(*hold, *exit, stdout)
	if err != nil {
		return usageErrorf(fs, "%v", err)
	}
	dir, err := os.MkdirTemp("", "rivalmix-demo-")
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	if *keep {
		fmt.Fprintf(stderr, "state kept in %s\n", dir)
	} else {
		defer os.RemoveAll(dir)
	}
	if f.stateFile == "" {
		f.stateFile = filepath.Join(dir, "rivalmix.db")
	}
	lg, err := newLogger(f.logLevel, os.Stderr)
	if err != nil {
		return err
	}
	sc, err := f.serviceConfig()
	if err != nil {
		return err
	}
	r, err := start(ctx, &f, sc, lg)
	if err != nil {
		return err
	}
	defer r.close()
	runCtx, stopRun := context.WithCancel(ctx)
	defer stopRun()
	runDone := make(chan error, 1)
	go func() { runDone <- r.run(runCtx) }()

	fmt.Fprintf(stdout, "rivalmix demo: NATS %s, state %s\n", r.natsURL, f.stateFile)
	if u := httpURL(r); u != "" {
		fmt.Fprintf(stdout, "dashboard %s  (metrics %smetrics, read API %sv1/categories)\n", u, u, u)
	}
	fmt.Fprintf(stdout, "publishing %d weekly refits of %d products in category %s; %.0f%% of products switch segment at refit %d\n\n",
		s.refits, s.products, s.category, 100*s.switchShare, s.refits/2+1)

	events, err := r.js.OrderedConsumer(ctx, sc.Bus.OutputStream, jetstream.OrderedConsumerConfig{
		FilterSubjects: []string{sc.Bus.OutputPrefix() + "." + s.category + ".>"}})
	if err != nil {
		stopRun()
		<-runDone
		return fmt.Errorf("demo: watch events: %w", err)
	}
	subject := sc.Bus.InputPrefix() + "." + s.category
	kinds := map[string]int{}
	var lastMoves []string
	err = s.each(func(refit string, msgs [][]byte) error {
		t0 := time.Now()
		if err := publishPaced(ctx, r.js, subject, msgs, 0); err != nil {
			return err
		}
		sum, moves, err := waitSummary(ctx, events, refit, kinds, *timeout)
		if err != nil {
			return err
		}
		lastMoves = append(lastMoves, moves...)
		fmt.Fprintf(stdout, "refit %s: %d products, %d segments, %d moves, %d new alerts (%d active), ESS %.0f of %d, %.1fs\n",
			refit, sum.Products, sum.Segments, sum.Moves, sum.Alerts, sum.ActiveAlerts, sum.ESS, sum.Particles, time.Since(t0).Seconds())
		return nil
	})
	if err != nil {
		stopRun()
		<-runDone
		return fmt.Errorf("demo: %w", err)
	}
	printDemoSummary(stdout, r.views, s.category, kinds, lastMoves)
	switch {
	case holding && httpURL(r) != "":
		fmt.Fprintf(stdout, "\ndashboard up at %s until Ctrl-C (--exit stops after the last refit)\n", httpURL(r))
		<-ctx.Done()
	case holding:
		fmt.Fprintln(stdout, "\nrunning until Ctrl-C (no dashboard: --http-addr is empty)")
		<-ctx.Done()
	default:
		fmt.Fprintln(stdout, "\nstopping after the last refit: stdout is not a terminal or --exit was given (--hold keeps the dashboard up)")
	}
	stopRun()
	if err := <-runDone; err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	return nil
}

// demoHolds decides whether the demo keeps its dashboard up after the
// last refit: by default when stdout is a terminal (someone is there to
// open the link and press Ctrl-C), not under CI or with output piped;
// --hold and --exit force either way.
func demoHolds(hold, exit bool, stdout io.Writer) (bool, error) {
	switch {
	case hold && exit:
		return false, errors.New("--hold and --exit contradict each other; give at most one")
	case hold:
		return true, nil
	case exit:
		return false, nil
	}
	f, ok := stdout.(*os.File)
	return ok && isTerminal(f), nil
}

// demoSummary is the part of a refit summary event the demo prints.
type demoSummary struct {
	Refit        string  `json:"refit"`
	Products     int     `json:"products"`
	Segments     int     `json:"segments"`
	Moves        int     `json:"moves"`
	Alerts       int     `json:"alerts"`
	ActiveAlerts int     `json:"active_alerts"`
	ESS          float64 `json:"ess"`
	Particles    int     `json:"particles"`
}

type cloudEvent struct {
	Type    string          `json:"type"`
	Subject string          `json:"subject"`
	Data    json.RawMessage `json:"data"`
}

// waitSummary reads events until the summary of refit arrives, counting
// kinds and collecting move descriptions on the way.
func waitSummary(ctx context.Context, c jetstream.Consumer, refit string, kinds map[string]int, timeout time.Duration) (demoSummary, []string, error) {
	deadline := time.Now().Add(timeout)
	var moves []string
	for time.Now().Before(deadline) {
		if err := ctx.Err(); err != nil {
			return demoSummary{}, nil, err
		}
		msg, err := c.Next(jetstream.FetchMaxWait(time.Second))
		if err != nil {
			if errors.Is(err, jetstream.ErrNoMessages) || errors.Is(err, context.DeadlineExceeded) || strings.Contains(err.Error(), "timeout") {
				continue
			}
			return demoSummary{}, nil, err
		}
		kind := msg.Subject()[strings.LastIndexByte(msg.Subject(), '.')+1:]
		kinds[kind]++
		var ev cloudEvent
		if err := json.Unmarshal(msg.Data(), &ev); err != nil {
			return demoSummary{}, nil, fmt.Errorf("event on %s: %w", msg.Subject(), err)
		}
		switch kind {
		case "moved":
			var mv alerts.Moved
			if err := json.Unmarshal(ev.Data, &mv); err != nil {
				return demoSummary{}, nil, fmt.Errorf("moved event: %w", err)
			}
			moves = append(moves, fmt.Sprintf("%s: %s -> %s", mv.Product, mv.From, mv.To))
		case "summary":
			var s demoSummary
			if err := json.Unmarshal(ev.Data, &s); err != nil {
				return demoSummary{}, nil, fmt.Errorf("summary event: %w", err)
			}
			if s.Refit == refit {
				return s, moves, nil
			}
		}
	}
	return demoSummary{}, nil, fmt.Errorf("no summary event for refit %s within %v", refit, timeout)
}

func printDemoSummary(w io.Writer, views *read.Views, category string, kinds map[string]int, moves []string) {
	fmt.Fprintf(w, "\nsegments of %s after the last refit:\n", category)
	segs, _ := views.Segments(category)
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(tw, "segment\tsize\tmedian 1st\tmedian 2nd\tmedian 3rd\tmean reported\t\n")
	for _, sg := range segs {
		fmt.Fprintf(tw, "%s\t%d\t%s\t%s\t%s\t%s\t\n", sg.ID, sg.Size, fmtMedian(float64(sg.Medians[0])), fmtMedian(float64(sg.Medians[1])),
			fmtMedian(float64(sg.Medians[2])), fmtMedian(float64(sg.MeanReported)))
	}
	tw.Flush()
	fmt.Fprintf(w, "\nevents: %d segment moves, %d missed-competitor alerts, %d cleared, %d born, %d retired, %d refit summaries\n",
		kinds["moved"], kinds["missed"], kinds["cleared"], kinds["born"], kinds["retired"], kinds["summary"])
	if len(moves) > 0 {
		n := min(len(moves), 10)
		fmt.Fprintf(w, "moves (first %d of %d): %s\n", n, len(moves), strings.Join(moves[:n], ", "))
	}
	fmt.Fprintln(w, "\n"+alerts.Caution)
}
