package main

import (
	"bytes"
	"cmp"
	"fmt"
	"os"
	"path/filepath"
	"slices"

	"rivalmix/figures"
	"rivalmix/stream/category"
)

// reportProducts bounds the product sections of a report: the products
// with the most probable active alerts, then the latest moved ones.
const reportProducts = 12

// writeReport writes v as one self-contained HTML file (figures inline,
// no outside resources), through a temporary file renamed into place.
func writeReport(path string, v category.View, note string) error {
	var chosen []string
	seen := map[string]bool{}
	add := func(p string) {
		if _, ok := v.Products[p]; ok && !seen[p] && len(chosen) < reportProducts {
			seen[p] = true
			chosen = append(chosen, p)
		}
	}
	alertsByProb := slices.Clone(v.Alerts)
	slices.SortStableFunc(alertsByProb, func(a, b category.AlertView) int { return cmp.Compare(b.Probability, a.Probability) })
	for _, a := range alertsByProb[:min(len(alertsByProb), reportProducts/2)] {
		add(a.Product)
	}
	for _, m := range v.Moves(0) {
		add(m.Product)
	}
	for _, a := range alertsByProb {
		add(a.Product)
	}
	slices.SortFunc(chosen, category.CompareIDs)
	pg, err := figures.BuildCategory(v, figures.Options{ProductLink: func(p string) string {
		if seen[p] {
			return "#" + figures.ProductAnchor(p)
		}
		return ""
	}})
	if err != nil {
		return err
	}
	for _, p := range chosen {
		pp, err := figures.BuildProduct(v, pg.Bands, p)
		if err != nil {
			return err
		}
		pg.Products = append(pg.Products, pp)
	}
	var b bytes.Buffer
	if err := figures.RenderReport(&b, pg, note); err != nil {
		return fmt.Errorf("render report: %w", err)
	}
	tmp, err := os.CreateTemp(filepath.Dir(path), ".report-*.html")
	if err != nil {
		return err
	}
	defer os.Remove(tmp.Name())
	if _, err := tmp.Write(b.Bytes()); err != nil {
		tmp.Close()
		return err
	}
	if err := tmp.Chmod(0o644); err != nil {
		tmp.Close()
		return err
	}
	if err := tmp.Close(); err != nil {
		return err
	}
	return os.Rename(tmp.Name(), path)
}
