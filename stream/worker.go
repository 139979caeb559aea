package stream

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"slices"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/state"
)

// WorkerConfig holds one category's model and alert settings.
type WorkerConfig struct {
	Particles sequential.ParticleConfig
	Alerts    alerts.Config
	Summary   sequential.SummaryOptions
	// Seed seeds a new category's particle system (with the category
	// name, so categories draw independent streams).
	Seed uint64
	// BatchSize closes a micro-batch (a Settle) once this many products
	// changed since the last settle. The count is part of the saved
	// state, so the settle points, and hence the posterior, do not depend
	// on how messages were grouped into fetches or commits.
	BatchSize int
	// Competitors is the category's default L for messages that do not
	// state it (the decoder's DefaultCompetitors).
	Competitors int
}

// DefaultWorkerConfig returns the package defaults of sequential and alerts.
func DefaultWorkerConfig() WorkerConfig {
	return WorkerConfig{
		Particles:   sequential.DefaultParticleConfig(),
		Alerts:      alerts.DefaultConfig(),
		Summary:     sequential.DefaultSummaryOptions(),
		Seed:        1,
		BatchSize:   256,
		Competitors: 10,
	}
}

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

// RefitReport is the outcome of one completed refit of a category.
type RefitReport struct {
	Category, Refit string
	Events          []alerts.Event
	Summary         sequential.Summary
	Products        []string
	Labels          []string // reported segment id per product
	Alerts          alerts.Outcome
	ESS             float64
	Diversity       int
	MeanSurprise    float64
	Changes         int // data changes since the previous refit
}

// Worker keeps one category's particle system, product records and alert
// memory, and applies decoded input messages to them. It is the update
// path shared by `rivalmix replay` (file in, file out) and the service
// (bus in, outbox out). It does no I/O. Not safe for concurrent use.
type Worker struct {
	category string
	cfg      WorkerConfig
	ps       *sequential.Particles
	mem      alerts.Memory
	records  map[string]state.ProductRecord

	lastRefit string // last completed refit
	// since the last completed refit
	surpriseSum float64
	surpriseN   int
	changes     int
	// since the last Flush
	dirty map[string]bool
}

// NewWorker starts an empty category.
func NewWorker(category string, cfg WorkerConfig) (*Worker, error) {
	if err := cfg.Alerts.Validate(); err != nil {
		return nil, fmt.Errorf("category %s: %w", category, err)
	}
	if cfg.BatchSize < 1 {
		return nil, fmt.Errorf("category %s: batch size %d, want >= 1", category, cfg.BatchSize)
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
	}
	for _, r := range records {
		w.records[r.Product] = r
	}
	return w, nil
}

// Category returns the category name.
func (w *Worker) Category() string { return w.category }

// Particles returns the category's particle system (read-only use).
func (w *Worker) Particles() *sequential.Particles { return w.ps }

// Record returns the last applied record of a product.
func (w *Worker) Record(product string) (state.ProductRecord, bool) {
	r, ok := w.records[product]
	return r, ok
}

// ErrModel reports a message that decoded but the model cannot take.
var ErrModel = errors.New("stream: message not applicable")

// Apply applies one decoded message; seq is its input position. Control
// messages (refit complete) are not handled here: call CompleteRefit.
// After BatchSize changed products it settles (closes the micro-batch).
func (w *Worker) Apply(m Message, seq uint64) (Applied, error) {
	out, err := w.apply(m, seq)
	if err == nil && w.ps.Pending() >= w.cfg.BatchSize {
		w.ps.Settle()
	}
	return out, err
}

func (w *Worker) apply(m Message, seq uint64) (Applied, error) {
	switch m.Kind {
	case KindDatum:
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
	case KindWithdrawn:
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

// CompleteRefit ends a refit: the refit-sized rejuvenation, the posterior
// summary, stable segment ids and alerts. It returns the events to
// publish; the alert memory moves on.
func (w *Worker) CompleteRefit(refit string) (RefitReport, error) {
	rep := RefitReport{Category: w.category, Refit: refit, Changes: w.changes}
	if w.ps.Len() == 0 {
		return rep, nil
	}
	w.ps.SettleRefit()
	data := w.ps.Data()
	sum, err := w.ps.Summary(w.cfg.Summary)
	if err != nil {
		return rep, fmt.Errorf("category %s refit %s: %w", w.category, refit, err)
	}
	rep.Summary = sum
	rep.Products = w.ps.Products()
	rep.ESS = w.ps.ESS()
	rep.Diversity = w.ps.Diversity()
	rep.MeanSurprise = math.NaN() // no datum changed: the summary omits it
	if w.surpriseN > 0 {
		rep.MeanSurprise = w.surpriseSum / float64(w.surpriseN)
	}
	out, err := alerts.Evaluate(w.cfg.Alerts, w.mem, alerts.Refit{
		Category: w.category, Refit: refit, Products: rep.Products, Data: data, Summary: sum,
		ESS: rep.ESS, Particles: w.ps.NumParticles(), Diversity: rep.Diversity, MeanSurprise: rep.MeanSurprise,
	})
	if err != nil {
		return rep, fmt.Errorf("category %s refit %s: %w", w.category, refit, err)
	}
	w.mem = out.Memory
	rep.Alerts = out
	rep.Events = out.Events
	rep.Labels = out.Labels
	w.surpriseSum, w.surpriseN, w.changes = 0, 0, 0
	w.lastRefit = refit
	return rep, nil
}

// Current summarises the category as it stands, without moving the
// particles or the alert memory: what the read API shows after a restart
// until the next refit completes. Events are not returned.
func (w *Worker) Current() (RefitReport, error) {
	rep := RefitReport{Category: w.category, Refit: w.lastRefit}
	if w.ps.Len() == 0 || w.lastRefit == "" {
		return rep, nil
	}
	data := w.ps.Data()
	sum, err := sequential.Summarize(w.ps.Draws(), data, w.cfg.Summary)
	if err != nil {
		return rep, fmt.Errorf("category %s: %w", w.category, err)
	}
	rep.Summary = sum
	rep.Products = w.ps.Products()
	rep.ESS = w.ps.ESS()
	rep.Diversity = w.ps.Diversity()
	// Evaluating the last refit again against the memory it produced
	// gives the labels it reported; the outcome's memory is discarded.
	out, err := alerts.Evaluate(w.cfg.Alerts, w.mem, alerts.Refit{
		Category: w.category, Refit: w.lastRefit, Products: rep.Products, Data: data, Summary: sum,
		ESS: rep.ESS, Particles: w.ps.NumParticles(), Diversity: rep.Diversity,
	})
	if err != nil {
		return rep, fmt.Errorf("category %s: %w", w.category, err)
	}
	rep.Alerts = out
	rep.Labels = out.Labels
	return rep, nil
}

// Changes is what a Flush hands to the store: everything that changed
// since the previous Flush, to commit in one transaction.
type Changes struct {
	Category    string
	Snapshot    []byte
	Records     []state.ProductRecord
	AlertMemory []byte
}

// workerMemory is what a worker keeps besides the particle system and the
// product records: the alert memory and the running totals of the refit
// in progress, so that a restart mid-refit reports the same summary.
// Stored as the category's alert-memory bytes.
type workerMemory struct {
	Alerts        alerts.Memory `json:"alerts"`
	SurpriseSum   float64       `json:"surprise_sum"`
	SurpriseCount int           `json:"surprise_count"`
	Changes       int           `json:"changes"`
	LastRefit     string        `json:"last_refit,omitempty"`
}

// Flush returns the category's changed state and forgets the change set.
func (w *Worker) Flush() (Changes, error) {
	mem, err := json.Marshal(workerMemory{Alerts: w.mem, SurpriseSum: w.surpriseSum, SurpriseCount: w.surpriseN,
		Changes: w.changes, LastRefit: w.lastRefit})
	if err != nil {
		return Changes{}, fmt.Errorf("category %s: alert memory: %w", w.category, err)
	}
	c := Changes{Category: w.category, Snapshot: w.ps.Encode(), AlertMemory: mem}
	for _, id := range sortedKeys(w.dirty) {
		c.Records = append(c.Records, w.records[id])
	}
	clear(w.dirty)
	return c, nil
}

func sortedKeys[V any](m map[string]V) []string {
	out := make([]string, 0, len(m))
	for k := range m {
		out = append(out, k)
	}
	slices.Sort(out)
	return out
}
