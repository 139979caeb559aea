package category

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/state"
	"rivalmix/stream/input"
)

// Applied is what Worker.Apply did with one message.
type Applied int

// Outcomes of Worker.Apply.
const (
	// AppliedAdd: a new product entered the model.
	AppliedAdd Applied = iota + 1
	// AppliedReplace: a known product's datum was replaced (a refit).
	AppliedReplace
	// AppliedRemove: a withdrawn product left the model.
	AppliedRemove
	// AppliedDuplicate: the same product, refit and content were applied
	// before (a redelivery); nothing changed.
	AppliedDuplicate
	// AppliedNoop: a withdrawal of an unknown product, or a control message.
	AppliedNoop
)

// Worker keeps one category's particle system, product records and alert
// memory, and applies decoded input messages to them. It does no I/O. Not
// safe for concurrent use.
type Worker struct {
	category string
	cfg      WorkerConfig
	ps       *sequential.Particles
	mem      alerts.Memory
	records  map[string]state.ProductRecord

	lastRefit string // last completed refit
	refits    int    // refits completed
	events    int    // events emitted by them
	// since the last completed refit
	surpriseSum float64
	surpriseN   int
	changes     int
	// completed refits, oldest first (at most HistoryLimit)
	history []RefitPoint
	// since the last Flush
	dirty map[string]bool
}

// NewWorker starts an empty category.
func NewWorker(category string, cfg WorkerConfig) (*Worker, error) {
	if err := cfg.Validate(); err != nil {
		return nil, fmt.Errorf("category %s: %w", category, err)
	}
	ps, err := sequential.NewParticles(cfg.Particles, cfg.Seed, categorySeed(category))
	if err != nil {
		return nil, fmt.Errorf("category %s: %w", category, err)
	}
	return &Worker{category: category, cfg: cfg, ps: ps, mem: alerts.Memory{},
		records: map[string]state.ProductRecord{}, dirty: map[string]bool{}}, nil
}

// categorySeed hashes the category name (FNV-1a) into the second seed
// word, so that categories draw independent streams from one seed.
func categorySeed(category string) uint64 {
	h := uint64(14695981039346656037)
	for i := 0; i < len(category); i++ {
		h ^= uint64(category[i])
		h *= 1099511628211
	}
	return h
}

// RestoreWorker rebuilds a category from its committed state: the encoded
// particle system, the alert memory JSON and the product records.
func RestoreWorker(category string, cfg WorkerConfig, snapshot, alertMemory []byte, records []state.ProductRecord) (*Worker, error) {
	w, err := NewWorker(category, cfg)
	if err != nil {
		return nil, err
	}
	if w.ps, err = sequential.DecodeParticles(snapshot, cfg.Particles.Workers); err != nil {
		return nil, fmt.Errorf("category %s: snapshot: %w", category, err)
	}
	if len(alertMemory) > 0 {
		var m workerMemory
		if err := json.Unmarshal(alertMemory, &m); err != nil {
			return nil, fmt.Errorf("category %s: alert memory: %w", category, err)
		}
		w.mem, w.surpriseSum, w.surpriseN, w.changes, w.lastRefit = m.Alerts, m.SurpriseSum, m.SurpriseCount, m.Changes, m.LastRefit
		w.refits, w.events, w.history = m.Refits, m.Events, m.History
	}
	for _, r := range records {
		w.records[r.Product] = r
	}
	return w, nil
}

// Category returns the category name.
func (w *Worker) Category() string { return w.category }

// Config returns the category's settings.
func (w *Worker) Config() WorkerConfig { return w.cfg }

// Particles returns the category's particle system (read-only use).
func (w *Worker) Particles() *sequential.Particles { return w.ps }

// LastRefit returns the last completed refit, "" before the first.
func (w *Worker) LastRefit() string { return w.lastRefit }

// ActiveAlerts returns the number of products with a missed-competitor
// alert in force after the last completed refit (alerts.AlertMemory.Active).
func (w *Worker) ActiveAlerts() int {
	n := 0
	for _, am := range w.mem.Alert {
		if am.Active {
			n++
		}
	}
	return n
}

// Changes returns the number of data changes since the last completed
// refit: 0 means a refit-complete now would only repeat the last one.
func (w *Worker) Changes() int { return w.changes }

// Record returns the last applied record of a product.
func (w *Worker) Record(product string) (state.ProductRecord, bool) {
	r, ok := w.records[product]
	return r, ok
}

// ErrModel reports a message that decoded but the model cannot take.
var ErrModel = errors.New("category: message not applicable")

// Apply applies one decoded message; seq is its input position. Control
// messages (refit complete) are not handled here: call CompleteRefit.
// After BatchSize changed products it settles (closes the micro-batch):
// inside a refit not yet completed (the message names a refit other than
// the last completed one) without the diversity watch, whose renewal the
// refit's end repeats; between refits with it.
func (w *Worker) Apply(m input.Message, seq uint64) (Applied, error) {
	out, err := w.apply(m, seq)
	if err == nil && w.ps.Pending() >= w.cfg.BatchSize {
		if m.Kind == input.KindDatum && m.Refit != w.lastRefit {
			w.ps.SettleInRefit()
		} else {
			w.ps.Settle()
		}
	}
	return out, err
}

func (w *Worker) apply(m input.Message, seq uint64) (Applied, error) {
	switch m.Kind {
	case input.KindDatum:
		hash := state.Hash(m.Hash)
		prev, known := w.records[m.Product]
		if known && !prev.Withdrawn && prev.Refit == m.Refit && prev.Hash == hash {
			return AppliedDuplicate, nil
		}
		d, err := sequential.NewDatum(m.Relative, m.Competitors)
		if err != nil {
			return 0, fmt.Errorf("%w: product %s: %w", ErrModel, m.Product, err)
		}
		var lp float64
		outcome := AppliedAdd
		if w.ps.Has(m.Product) {
			outcome = AppliedReplace
			lp, err = w.ps.Replace(m.Product, d)
		} else {
			lp, err = w.ps.Add(m.Product, d)
		}
		if err != nil {
			return 0, fmt.Errorf("%w: product %s: %w", ErrModel, m.Product, err)
		}
		if !math.IsNaN(lp) && !math.IsInf(lp, 0) {
			w.surpriseSum -= lp
			w.surpriseN++
		}
		rec := state.ProductRecord{Product: m.Product, Refit: m.Refit, Hash: hash, Competitors: m.Competitors,
			Relative: m.Relative, IDs: m.IDs, Own: m.Own, AppliedSeq: seq}
		for _, e := range m.Dropped {
			rec.Dropped = append(rec.Dropped, state.DroppedEntry{ID: e.ID, Value: e.Value})
		}
		w.records[m.Product] = rec
		w.dirty[m.Product] = true
		w.changes++
		return outcome, nil
	case input.KindWithdrawn:
		if !w.ps.Has(m.Product) {
			return AppliedNoop, nil
		}
		if err := w.ps.Remove(m.Product); err != nil {
			return 0, fmt.Errorf("%w: product %s: %w", ErrModel, m.Product, err)
		}
		r := w.records[m.Product]
		r.Withdrawn = true
		r.Hash = state.Hash(m.Hash)
		r.AppliedSeq = seq
		w.records[m.Product] = r
		w.dirty[m.Product] = true
		w.changes++
		return AppliedRemove, nil
	}
	return AppliedNoop, nil
}
