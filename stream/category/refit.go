package category

import (
	"fmt"
	"math"
	"slices"

	"rivalmix/alerts"
	"rivalmix/sequential"
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
	// Distinct is the number of distinct partitions among the particles
	// (the diversity watch's count; see sequential.Particles.DistinctStates).
	Distinct     int
	MeanSurprise float64 // NaN when the refit changed no datum
	Changes      int     // data changes since the previous refit
	// Draws are the particles' weighted draws after the refit, without
	// their placement records, and Data the products' data (aligned with
	// Products): what the dashboard's figures are computed from.
	Draws []sequential.Draw
	Data  []*sequential.Datum
	// History is the category's completed refits, this one last.
	History []RefitPoint
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
	sum, err := w.ps.Summary(w.summaryOptions())
	if err != nil {
		return rep, fmt.Errorf("category %s refit %s: %w", w.category, refit, err)
	}
	rep.Summary = sum
	rep.Products = w.ps.Products()
	rep.ESS = w.ps.ESS()
	rep.Diversity = w.ps.Diversity()
	rep.Distinct = w.ps.DistinctStates()
	rep.MeanSurprise = math.NaN() // no datum changed: the summary omits it
	if w.surpriseN > 0 {
		rep.MeanSurprise = w.surpriseSum / float64(w.surpriseN)
	}
	em, err := w.emission(data, sum)
	if err != nil {
		return rep, fmt.Errorf("category %s refit %s: %w", w.category, refit, err)
	}
	out, err := alerts.Evaluate(w.cfg.Alerts, w.mem, alerts.Refit{
		Category: w.category, Refit: refit, Products: rep.Products, Data: data, Summary: sum,
		ESS: rep.ESS, Particles: w.ps.NumParticles(), Diversity: rep.Diversity, MeanSurprise: rep.MeanSurprise,
		Emission: em,
	})
	if err != nil {
		return rep, fmt.Errorf("category %s refit %s: %w", w.category, refit, err)
	}
	w.mem = out.Memory
	rep.Alerts = out
	rep.Events = out.Events
	rep.Labels = out.Labels
	rep.Draws, rep.Data = figureDraws(w.ps.Draws()), data
	w.history = appendHistory(w.history, newRefitPoint(&rep))
	rep.History = cloneHistory(w.history)
	w.surpriseSum, w.surpriseN, w.changes = 0, 0, 0
	w.lastRefit = refit
	w.refits++
	w.events += len(out.Events)
	return rep, nil
}

// Current summarises the category as it stands, without moving the
// particles or the alert memory: what the read API shows after a restart
// until the next refit completes. Events are not returned.
func (w *Worker) Current() (RefitReport, error) {
	rep := RefitReport{Category: w.category, Refit: w.lastRefit, MeanSurprise: math.NaN()}
	if w.ps.Len() == 0 || w.lastRefit == "" {
		return rep, nil
	}
	data := w.ps.Data()
	sum, err := sequential.Summarize(w.ps.Draws(), data, w.summaryOptions())
	if err != nil {
		return rep, fmt.Errorf("category %s: %w", w.category, err)
	}
	rep.Summary = sum
	rep.Products = w.ps.Products()
	rep.ESS = w.ps.ESS()
	rep.Diversity = w.ps.Diversity()
	rep.Distinct = w.ps.DistinctStates()
	// Evaluating the last refit again against the memory it produced
	// gives the labels it reported; the outcome's memory is discarded.
	em, err := w.emission(data, sum)
	if err != nil {
		return rep, fmt.Errorf("category %s: %w", w.category, err)
	}
	out, err := alerts.Evaluate(w.cfg.Alerts, w.mem, alerts.Refit{
		Category: w.category, Refit: w.lastRefit, Products: rep.Products, Data: data, Summary: sum,
		ESS: rep.ESS, Particles: w.ps.NumParticles(), Diversity: rep.Diversity, Emission: em,
	})
	if err != nil {
		return rep, fmt.Errorf("category %s: %w", w.category, err)
	}
	rep.Alerts = out
	rep.Labels = out.Labels
	rep.Draws, rep.Data = figureDraws(w.ps.Draws()), data
	rep.History = cloneHistory(w.history)
	return rep, nil
}

// figureDraws drops the draws' placement records, which the figures do
// not use and which cost more memory than the labels.
func figureDraws(draws []sequential.Draw) []sequential.Draw {
	for i := range draws {
		draws[i].Soft = nil
	}
	return draws
}

// BatchReport is the report of a batch fit (rivalmix fit): the summary,
// stable segment ids and alerts that a category's first refit would give
// with a fresh alert memory, the draws and a one-point history. cfg must
// hold the threshold the summary was computed at.
func BatchReport(cat, refit string, products []string, data []*sequential.Datum, draws []sequential.Draw,
	sum sequential.Summary, cfg alerts.Config) (RefitReport, error) {
	rep := RefitReport{Category: cat, Refit: refit, Summary: sum, Products: products, ESS: sum.ESS,
		MeanSurprise: math.NaN(), Changes: len(products), Data: data}
	out, err := alerts.Evaluate(cfg, alerts.Memory{}, alerts.Refit{Category: cat, Refit: refit, Products: products,
		Data: data, Summary: sum, ESS: sum.ESS, Particles: len(draws), MeanSurprise: math.NaN()})
	if err != nil {
		return rep, fmt.Errorf("category %s refit %s: %w", cat, refit, err)
	}
	rep.Alerts, rep.Events, rep.Labels = out, out.Events, out.Labels
	rep.Draws = figureDraws(slices.Clone(draws))
	rep.History = []RefitPoint{newRefitPoint(&rep)}
	return rep, nil
}

// emission returns the per-segment log predictive densities the filter
// rule needs (nil under the band rule, which does not read them).
func (w *Worker) emission(data []*sequential.Datum, sum sequential.Summary) ([][]float64, error) {
	if w.cfg.Alerts.Rule != alerts.RuleFilter {
		return nil, nil
	}
	return sequential.SegmentLogPredictive(w.ps.Draws(), data, sum.Partition, len(sum.Segments), w.cfg.Summary.Prior)
}

// summaryOptions returns the category's summary options with ExcessFrom
// lowered, when needed, to the lowest probability at which a
// missed-competitor alert stays in force (AlertProb - RealertMargin), so
// that every alert in force has its expected excess for the ranking.
func (w *Worker) summaryOptions() sequential.SummaryOptions {
	opt := w.cfg.Summary
	opt.ExcessFrom = min(opt.ExcessFrom, max(0, w.cfg.Alerts.AlertProb-w.cfg.Alerts.RealertMargin))
	return opt
}
