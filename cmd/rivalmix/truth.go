package main

import (
	"bufio"
	"encoding/json"
	"fmt"
	"io"
	"maps"
	"os"
	"slices"
	"strings"
	"text/tabwriter"

	"rivalmix/alerts"
)

// truthRefit is one line of a truth file: the true segment (index into
// the simulated category's segments) of every product at one refit, and
// the products whose planted move to another segment happens at it.
type truthRefit struct {
	Category string         `json:"category"`
	Refit    string         `json:"refit"`
	Segment  map[string]int `json:"segment"`
	Switched []string       `json:"switched,omitempty"`
}

// truthPath names the truth file beside a simulate output file.
func truthPath(out string) string {
	return strings.TrimSuffix(out, ".jsonl") + ".truth.jsonl"
}

func writeTruth(path string, lines []truthRefit) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	bw := bufio.NewWriter(f)
	enc := json.NewEncoder(bw)
	for _, l := range lines {
		if err := enc.Encode(l); err != nil {
			f.Close()
			return err
		}
	}
	if err := bw.Flush(); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}

// readTruth reads a truth file: category -> refit -> line. Errors name
// the line and the field.
func readTruth(path string) (map[string]map[string]truthRefit, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	out := map[string]map[string]truthRefit{}
	sc := bufio.NewScanner(f)
	sc.Buffer(make([]byte, 0, 64<<10), 16<<20)
	for n := 1; sc.Scan(); n++ {
		if len(strings.TrimSpace(sc.Text())) == 0 {
			continue
		}
		var tr truthRefit
		dec := json.NewDecoder(strings.NewReader(sc.Text()))
		dec.DisallowUnknownFields()
		if err := dec.Decode(&tr); err != nil {
			return nil, fmt.Errorf("%s line %d: %w", path, n, err)
		}
		if tr.Category == "" || tr.Refit == "" || len(tr.Segment) == 0 {
			return nil, fmt.Errorf("%s line %d: category, refit and segment are required", path, n)
		}
		for _, p := range tr.Switched {
			if _, ok := tr.Segment[p]; !ok {
				return nil, fmt.Errorf("%s line %d: switched product %q has no segment", path, n, p)
			}
		}
		if out[tr.Category] == nil {
			out[tr.Category] = map[string]truthRefit{}
		}
		out[tr.Category][tr.Refit] = tr
	}
	return out, sc.Err()
}

// truthRow is what replay keeps of one refit for the backtest.
type truthRow struct {
	refit    string
	products []string
	point    []string // point segment id per product
	moves    []alerts.Moved
}

// truthScore is the backtest of one category's moves against a truth
// file, scored as alerts/backtest_test.go does: each true segment is
// named by the point segment id holding most of its products at the
// refit; a move at a planted move's refit or the next is right when it
// goes to the id of the product's new true segment; a switcher's right
// move after that is late (neither right nor false); every other move is
// false. Recall counts the planted moves whose old and new true segments
// had different ids (visible); the false-move rate per refit is over the
// refits with no planted move at it or the one before.
type truthScore struct {
	right, wrong, late, falseMoves int
	visible, planted, detected     int
	products                       int // products over the refits the false-move rate covers
}

func (s truthScore) precision() float64 { return float64(s.right) / max(float64(s.right+s.wrong), 1) }
func (s truthScore) recall() float64    { return float64(s.detected) / max(float64(s.visible), 1) }
func (s truthScore) falseRate() float64 { return float64(s.falseMoves) / max(float64(s.products), 1) }

// scoreTruth writes the per-refit backtest table of one category and
// returns the totals.
func scoreTruth(w io.Writer, cat string, rows []truthRow, truth map[string]truthRefit) (truthScore, error) {
	var sc truthScore
	movedAt := map[string]int{} // product -> index of its planted move's refit
	var prevMaj map[int]string
	var prevTruth map[string]int
	visible := map[string]bool{}
	detected := map[string]bool{}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(tw, "category\trefit\tproducts\tplanted\tmoves\tright\tlate\tfalse\tfalse rate\t\n")
	for r, row := range rows {
		tr, ok := truth[row.refit]
		if !ok {
			return sc, fmt.Errorf("truth file has no refit %s of category %s", row.refit, cat)
		}
		maj := majority(row, tr)
		for _, p := range tr.Switched {
			movedAt[p] = r
			sc.planted++
			if prevMaj != nil && prevMaj[prevTruth[p]] != maj[tr.Segment[p]] {
				visible[p] = true
				sc.visible++
			}
		}
		windowRefit := false
		for _, at := range movedAt {
			if at == r || at == r-1 {
				windowRefit = true
			}
		}
		right, late, falseN := 0, 0, 0
		for _, m := range row.moves {
			at, planted := movedAt[m.Product]
			toNew := planted && r >= at && m.To == maj[tr.Segment[m.Product]]
			switch {
			case toNew && r <= at+1:
				right++
				if visible[m.Product] {
					detected[m.Product] = true
				}
			case toNew:
				late++
			case windowRefit:
				sc.wrong++
				falseN++
			default:
				falseN++
				sc.falseMoves++
			}
		}
		sc.right += right
		sc.late += late
		rate := "-"
		if !windowRefit && r > 0 {
			sc.products += len(row.products)
			rate = fmt.Sprintf("%.4f", float64(falseN)/float64(len(row.products)))
		}
		fmt.Fprintf(tw, "%s\t%s\t%d\t%d\t%d\t%d\t%d\t%d\t%s\t\n", cat, row.refit, len(row.products), len(tr.Switched), len(row.moves), right, late, falseN, rate)
		prevMaj, prevTruth = maj, tr.Segment
	}
	tw.Flush()
	sc.detected = len(detected)
	return sc, nil
}

// majority maps each true segment to the point segment id holding most
// of its products at the refit (ties to the smaller id).
func majority(row truthRow, tr truthRefit) map[int]string {
	count := map[int]map[string]int{}
	for i, p := range row.products {
		s, ok := tr.Segment[p]
		if !ok {
			continue
		}
		if count[s] == nil {
			count[s] = map[string]int{}
		}
		count[s][row.point[i]]++
	}
	out := map[int]string{}
	for s, c := range count {
		best := 0
		for _, id := range slices.Sorted(maps.Keys(c)) {
			if c[id] > best {
				out[s], best = id, c[id]
			}
		}
	}
	return out
}
