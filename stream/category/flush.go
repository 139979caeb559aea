package category

import (
	"encoding/json"
	"fmt"
	"maps"
	"slices"
	"time"

	"rivalmix/alerts"
	"rivalmix/state"
)

// Changes is what a Flush hands to the store: everything that changed
// since the previous Flush, to commit in one transaction.
type Changes struct {
	Category    string
	Snapshot    []byte
	Records     []state.ProductRecord
	AlertMemory []byte
}

// workerMemory is what a worker keeps besides the particle system and the
// product records: the alert memory, its refit and event counts and the
// running totals of the refit in progress, so that a restart mid-refit
// reports the same summary. Stored as the category's alert-memory bytes;
// fields absent from an older file read as zero.
type workerMemory struct {
	Alerts        alerts.Memory `json:"alerts"`
	SurpriseSum   float64       `json:"surprise_sum"`
	SurpriseCount int           `json:"surprise_count"`
	Changes       int           `json:"changes"`
	LastRefit     string        `json:"last_refit,omitempty"`
	Refits        int           `json:"refits,omitempty"`
	Events        int           `json:"events,omitempty"`
	// History holds the last completed refits (savedHistory).
	History []RefitPoint `json:"history,omitempty"`
}

// Flush returns the category's changed state and forgets the change set.
func (w *Worker) Flush() (Changes, error) {
	mem, err := json.Marshal(workerMemory{Alerts: w.mem, SurpriseSum: w.surpriseSum, SurpriseCount: w.surpriseN,
		Changes: w.changes, LastRefit: w.lastRefit, Refits: w.refits, Events: w.events,
		History: savedHistory(w.history)})
	if err != nil {
		return Changes{}, fmt.Errorf("category %s: alert memory: %w", w.category, err)
	}
	c := Changes{Category: w.category, Snapshot: w.ps.Encode(), AlertMemory: mem}
	for _, id := range slices.Sorted(maps.Keys(w.dirty)) {
		c.Records = append(c.Records, w.records[id])
	}
	clear(w.dirty)
	return c, nil
}

// Meta returns the category's bookkeeping record as of now: products in
// the model, segments, refits and events of the completed refits, and the
// last refit. now is the caller's clock (this package reads none).
func (w *Worker) Meta(now time.Time) state.CategoryMeta {
	live := map[string]bool{}
	for _, id := range w.mem.Point {
		live[id] = true
	}
	return state.CategoryMeta{LastRefit: w.lastRefit, Refits: w.refits, Products: w.ps.Len(),
		Segments: len(live), Events: w.events, UpdatedAt: now.UTC()}
}
