package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"maps"
	"math"
	"os"
	"path/filepath"
	"slices"
	"text/tabwriter"
	"time"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/stream/category"
	"rivalmix/stream/input"
)

// replayConfig holds the flags of `rivalmix replay`.
type replayConfig struct {
	in, out, category, rejected string
	posterior                   string
	report                      string
	similarity                  bool
	seed                        uint64
	particles, batch            int
	competitors                 int
	strict, quiet               bool
	at                          string
	truth                       string
	events                      alerts.CloudEventConfig
}

func runReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("replay", "--in refits.jsonl --out events.jsonl [flags]",
		"Runs the service's update path over a file of input messages (refit results with refit-complete\n"+
			"control lines) and writes the events it would publish, one CloudEvents JSON object per line.\n"+
			"Lines are envelopes {\"subject\":\"rivalmix.in.<category>\",\"data\":{...},\"time\":\"RFC 3339\"}\n"+
			"as captured from the bus (\"time\" optional), or bare input messages of the category --category names.\n"+
			"An event's time is its refit-complete line's \"time\", or else --time.", stderr)
	var c replayConfig
	wd := category.DefaultWorkerConfig()
	fs.StringVar(&c.in, "in", "", "input file, one JSON message per line (required)")
	fs.StringVar(&c.out, "out", "", "events file to write (required)")
	fs.StringVar(&c.category, "category", "", "category of bare lines; envelope lines of other categories are skipped (default: every category, and bare lines are rejected)")
	fs.StringVar(&c.rejected, "rejected", "", "also write rejected lines with their reasons to this file")
	fs.Uint64Var(&c.seed, "seed", wd.Seed, "random seed; the same seed and input give a byte-identical events file")
	fs.IntVar(&c.particles, "particles", wd.Particles.Particles, "particles per category")
	fs.IntVar(&c.batch, "batch", wd.BatchSize, "changed products per micro-batch (a settle after each)")
	fs.IntVar(&c.competitors, "competitors", wd.Competitors, "candidate competitors L for messages that do not say")
	fs.BoolVar(&c.strict, "strict", false, "reject non-positive entries instead of dropping them")
	fs.BoolVar(&c.quiet, "quiet", false, "print nothing but errors: no progress lines, table or totals")
	fs.StringVar(&c.posterior, "posterior", "", "after the last refit, also write that refit's posterior in the shape of fit's posterior.json (one category: name it with --category if the input holds several)")
	fs.StringVar(&c.report, "report", "", "after the last refit, also write a self-contained HTML report (figures, tables and the timeline over all refits) of one category: name it with --category if the input holds several")
	fs.BoolVar(&c.similarity, "similarity", false, "with --posterior: also write the N x N co-segment probability matrix")
	fs.StringVar(&c.at, "time", "", "event time (RFC 3339) of refits whose refit-complete line carries none (default: when the replay starts)")
	rule := fs.String("move-rule", string(wd.Alerts.Rule), "move rule: band (membership band) or filter (switch filter)")
	fs.StringVar(&c.truth, "truth", "", "truth file of a simulated input (simulate writes it beside its output): also print the backtest of the moves, precision, recall and false moves per refit")
	eventFlags(fs, &c.events)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if c.in == "" || c.out == "" {
		return usageErrorf(fs, "--in and --out are required")
	}
	var truth map[string]map[string]truthRefit
	if c.truth != "" {
		var err error
		if truth, err = readTruth(c.truth); err != nil {
			return fmt.Errorf("replay: --truth: %w", err)
		}
	}
	mr, err := alerts.ParseMoveRule(*rule)
	if err != nil {
		return usageErrorf(fs, "--move-rule: %v", err)
	}
	wd.Alerts.Rule = mr
	wd.Seed = c.seed
	wd.BatchSize = c.batch
	wd.Particles.Particles = c.particles
	wd.Competitors = c.competitors
	if err := wd.Validate(); err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	if err := c.events.Validate(); err != nil {
		return fmt.Errorf("replay: --event-source or --event-type-prefix: %w", err)
	}
	at := time.Now().UTC()
	if c.at != "" {
		t, err := time.Parse(time.RFC3339Nano, c.at)
		if err != nil {
			return fmt.Errorf("replay: --time %q: want an RFC 3339 time such as 2026-11-30T06:00:00Z", c.at)
		}
		at = t
	}
	if c.category != "" {
		if _, err := input.CategoryFromSubject(input.DefaultInputPrefix+"."+c.category, ""); err != nil {
			return fmt.Errorf("replay: --category %q: %w", c.category, err)
		}
	}
	if c.posterior != "" {
		if err := checkWritable(c.posterior); err != nil {
			return fmt.Errorf("replay: --posterior: %w", err)
		}
	}
	if c.report != "" {
		if err := checkWritable(c.report); err != nil {
			return fmt.Errorf("replay: --report: %w", err)
		}
	}
	in, err := os.Open(c.in)
	if err != nil {
		return fmt.Errorf("replay: --in: %w", err)
	}
	defer in.Close()
	out, err := os.Create(c.out)
	if err != nil {
		return fmt.Errorf("replay: --out: %w", err)
	}
	defer out.Close()
	progress, rej, err := openOutputs(c.quiet, stderr, c.rejected)
	if err != nil {
		return fmt.Errorf("replay: --rejected: %w", err)
	}
	defer rej.file.Close()
	r := &replayer{cfg: c, wcfg: wd, workers: map[string]*replayCategory{}, out: bufio.NewWriter(out),
		rejected: rej, stderr: progress, at: at}
	r.opt = wd.DecodeOptions(input.DefaultDecodeOptions())
	r.opt.Strict = c.strict
	if err := r.run(ctx, in); err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	rej.close()
	if err := r.out.Flush(); err != nil {
		return fmt.Errorf("replay: write %s: %w", c.out, err)
	}
	if c.posterior != "" {
		if err := r.writePosterior(); err != nil {
			return fmt.Errorf("replay: --posterior: %w", err)
		}
	}
	if c.report != "" {
		if err := r.writeReport(); err != nil {
			return fmt.Errorf("replay: --report: %w", err)
		}
	}
	if c.quiet {
		return nil
	}
	r.printTable(stdout)
	if truth != nil {
		if err := r.printBacktest(stdout, truth); err != nil {
			return fmt.Errorf("replay: --truth: %w", err)
		}
	}
	fmt.Fprintf(stdout, "\n%d messages applied, %d duplicates, %d rejected, %d events written to %s\n\n%s\n",
		r.applied, r.duplicates, rej.n, r.events, c.out, alerts.Caution)
	return nil
}

// replayCategory is one category's worker and its per-refit table rows.
type replayCategory struct {
	w    *category.Worker
	prev map[string]int
	rows []replayRow
	last *refitPosterior // the posterior at the last refit-complete
	// with --report: the last refit's report and every refit's history
	// point (the worker's history keeps only the latest)
	lastRep *category.RefitReport
	history []category.RefitPoint
	// truth holds what the --truth backtest needs of each refit.
	truth []truthRow
}

// refitPosterior is what --posterior writes: a refit's draws, data and
// summary as its refit-complete left them.
type refitPosterior struct {
	products []string
	data     []*sequential.Datum
	draws    []sequential.Draw
	summary  sequential.Summary
}

// writePosterior writes the last refit's posterior of the one category
// (--category, or the only one in the input) in fit's shape.
func (r *replayer) writePosterior() error {
	cat, err := r.oneCategory()
	if err != nil {
		return err
	}
	rc, ok := r.workers[cat]
	if !ok || rc.last == nil {
		return fmt.Errorf("category %s completed no refit", cat)
	}
	lp := rc.last
	return writeJSON(r.cfg.posterior, newPosteriorFile(cat, lp.products, lp.data, lp.draws, lp.summary, r.cfg.similarity))
}

// oneCategory returns --category, or the only category of the input.
func (r *replayer) oneCategory() (string, error) {
	cat := r.cfg.category
	if cat == "" {
		if len(r.workers) != 1 {
			return "", fmt.Errorf("the input holds %d categories; name one with --category", len(r.workers))
		}
		for c := range r.workers {
			cat = c
		}
	}
	return cat, nil
}

// writeReport writes the HTML report of the one category: its last
// refit with the timeline over every refit of the replay.
func (r *replayer) writeReport() error {
	cat, err := r.oneCategory()
	if err != nil {
		return err
	}
	rc, ok := r.workers[cat]
	if !ok || rc.lastRep == nil {
		return fmt.Errorf("category %s completed no refit", cat)
	}
	v, err := category.NewView(*rc.lastRep, rc.w.Record)
	if err != nil {
		return err
	}
	v.History = rc.history
	note := fmt.Sprintf("Replay of %s: %d refits, %d particles, seed %d.", filepath.Base(r.cfg.in), len(rc.history),
		r.wcfg.Particles.Particles, r.cfg.seed)
	return writeReport(r.cfg.report, v, note)
}

type replayRow struct {
	category, refit           string
	products, segments, moves int
	alerts                    int
	ess                       float64
	particles, diversity      int
	ari                       float64
	hasPrev                   bool
	surprise                  float64
	elapsed                   time.Duration
}

type replayer struct {
	cfg      replayConfig
	wcfg     category.WorkerConfig
	opt      input.DecodeOptions
	workers  map[string]*replayCategory
	out      *bufio.Writer
	rejected *rejectLog
	stderr   io.Writer // progress; io.Discard when quiet
	at       time.Time // event time of refits whose complete line has none

	applied, duplicates, events int
}

// envelope is a captured bus message: subject, payload and, optionally,
// the time the stream stored it.
type envelope struct {
	Subject string          `json:"subject"`
	Data    json.RawMessage `json:"data"`
	Time    *time.Time      `json:"time"`
}

// errNoCategory is the reason for a bare line when --category is not set.
var errNoCategory = errors.New(`no category: a bare input line needs --category, or write it as {"subject":"rivalmix.in.<category>","data":...}`)

// split returns the category, payload and time (zero when not given) of
// one line.
func (r *replayer) split(line []byte) (string, []byte, time.Time, error) {
	var env envelope
	dec := json.NewDecoder(bytes.NewReader(line))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&env); err == nil && env.Subject != "" && len(env.Data) > 0 {
		cat, err := input.CategoryFromSubject(env.Subject, input.DefaultInputPrefix)
		var at time.Time
		if env.Time != nil {
			at = *env.Time
		}
		return cat, env.Data, at, err
	}
	if r.cfg.category == "" {
		return "", nil, time.Time{}, errNoCategory
	}
	return r.cfg.category, line, time.Time{}, nil
}

func (r *replayer) run(ctx context.Context, in io.Reader) error {
	sc := bufio.NewScanner(in)
	sc.Buffer(make([]byte, 0, 64<<10), 1<<20)
	line := 0
	start := time.Now()
	for sc.Scan() {
		line++
		if err := ctx.Err(); err != nil {
			return err
		}
		raw := bytes.TrimSpace(sc.Bytes())
		if len(raw) == 0 || raw[0] == '#' {
			continue
		}
		cat, payload, at, err := r.split(raw)
		if err != nil {
			if err := r.reject(line, raw, err); err != nil {
				return err
			}
			continue
		}
		if r.cfg.category != "" && cat != r.cfg.category {
			continue
		}
		m, err := input.Decode(payload, r.opt)
		if err != nil {
			if err := r.reject(line, raw, err); err != nil {
				return err
			}
			continue
		}
		rc, err := r.worker(cat)
		if err != nil {
			return err
		}
		if m.Kind == input.KindRefitComplete {
			if at.IsZero() {
				at = r.at
			}
			if err := r.complete(rc, m.Refit, at, start); err != nil {
				return err
			}
			continue
		}
		outcome, err := rc.w.Apply(m, uint64(line))
		if err != nil {
			if err := r.reject(line, raw, err); err != nil {
				return err
			}
			continue
		}
		switch outcome {
		case category.AppliedDuplicate:
			r.duplicates++
		case category.AppliedAdd, category.AppliedReplace, category.AppliedRemove:
			r.applied++
		}
	}
	if err := sc.Err(); err != nil {
		return fmt.Errorf("read line %d: %w", line+1, err)
	}
	return nil
}

func (r *replayer) worker(cat string) (*replayCategory, error) {
	if rc, ok := r.workers[cat]; ok {
		return rc, nil
	}
	w, err := category.NewWorker(cat, r.wcfg)
	if err != nil {
		return nil, err
	}
	rc := &replayCategory{w: w}
	r.workers[cat] = rc
	return rc, nil
}

func (r *replayer) reject(line int, raw []byte, reason error) error {
	if err := r.rejected.add(line, raw, reason); err != nil {
		return fmt.Errorf("write --rejected %s: %w", r.cfg.rejected, err)
	}
	return nil
}

// complete ends a refit of one category and writes its events with time
// at.
func (r *replayer) complete(rc *replayCategory, refit string, at, start time.Time) error {
	rep, err := rc.w.CompleteRefit(refit)
	if err != nil {
		return err
	}
	row := replayRow{category: rc.w.Category(), refit: refit, products: len(rep.Products),
		segments: len(rep.Summary.Segments), ess: rep.ESS, particles: rc.w.Particles().NumParticles(),
		diversity: rep.Diversity, surprise: rep.MeanSurprise, elapsed: time.Since(start)}
	for _, ev := range rep.Events {
		b, err := ev.CloudEvent(r.cfg.events, at)
		if err != nil {
			return err
		}
		r.out.Write(b)
		r.out.WriteByte('\n')
		r.events++
		switch ev.Kind {
		case alerts.KindMoved:
			row.moves++
		case alerts.KindMissed:
			row.alerts++
		}
	}
	cur := map[string]int{}
	for i, id := range rep.Products {
		cur[id] = rep.Summary.Partition[i]
	}
	if rc.prev != nil {
		var a, b []int
		for _, id := range rep.Products {
			if p, ok := rc.prev[id]; ok {
				a = append(a, p)
				b = append(b, cur[id])
			}
		}
		if len(a) > 1 {
			row.ari, row.hasPrev = sequential.AdjustedRand(a, b), true
		}
	}
	rc.prev = cur
	rc.rows = append(rc.rows, row)
	if r.cfg.report != "" && len(rep.Products) > 0 && len(rep.History) > 0 {
		rc.history = append(rc.history, rep.History[len(rep.History)-1])
		rc.lastRep = &rep
	}
	if r.cfg.truth != "" {
		tr := truthRow{refit: refit, products: rep.Products, point: rep.Alerts.Point}
		for _, ev := range rep.Events {
			if ev.Kind == alerts.KindMoved {
				tr.moves = append(tr.moves, ev.Data.(alerts.Moved))
			}
		}
		rc.truth = append(rc.truth, tr)
	}
	if r.cfg.posterior != "" && len(rep.Products) > 0 {
		ps := rc.w.Particles()
		rc.last = &refitPosterior{products: rep.Products, data: ps.Data(), draws: ps.Draws(), summary: rep.Summary}
	}
	fmt.Fprintf(r.stderr, "refit %s %s: %d products, %d segments, %d moves, %d alerts, ESS %.0f/%d, %.1fs\n",
		row.category, refit, row.products, row.segments, row.moves, row.alerts, row.ess, row.particles, row.elapsed.Seconds())
	return nil
}

func (r *replayer) printTable(w io.Writer) {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(tw, "category\trefit\tproducts\tsegments\tmoves\talerts\tESS\tancestors\tARI to previous\tmean surprise\t\n")
	cats := make([]string, 0, len(r.workers))
	for c := range r.workers {
		cats = append(cats, c)
	}
	slices.Sort(cats)
	for _, c := range cats {
		for _, row := range r.workers[c].rows {
			ari := "-"
			if row.hasPrev {
				ari = fmt.Sprintf("%.3f", row.ari)
			}
			surprise := "-"
			if !math.IsNaN(row.surprise) {
				surprise = fmt.Sprintf("%.2f", row.surprise)
			}
			fmt.Fprintf(tw, "%s\t%s\t%d\t%d\t%d\t%d\t%.0f/%d\t%d\t%s\t%s\t\n", row.category, row.refit, row.products,
				row.segments, row.moves, row.alerts, row.ess, row.particles, row.diversity, ari, surprise)
		}
	}
	tw.Flush()
}

// printBacktest prints, for each replayed category the truth file
// covers, the moves scored against the planted ones (scoreTruth).
func (r *replayer) printBacktest(w io.Writer, truth map[string]map[string]truthRefit) error {
	cats := slices.Sorted(maps.Keys(r.workers))
	for _, c := range cats {
		tr, ok := truth[c]
		if !ok {
			continue
		}
		fmt.Fprintf(w, "\nbacktest of the moves of %s against %s (move rule %s):\n", c, r.cfg.truth, r.wcfg.Alerts.Rule)
		sc, err := scoreTruth(w, c, r.workers[c].truth, tr)
		if err != nil {
			return err
		}
		fmt.Fprintf(w, "precision %.3f (%d right of %d moves at a planted move's refit or the next), recall %.3f (%d of %d visible planted moves, %d planted), %d late, false moves %.4f per product and refit elsewhere\n",
			sc.precision(), sc.right, sc.right+sc.wrong, sc.recall(), sc.detected, sc.visible, sc.planted, sc.late, sc.falseRate())
	}
	return nil
}
