package alerts

import (
	"maps"
	"slices"
)

// labelling is the result of matching a new point partition to the
// previous labelled one.
type labelling struct {
	ids    []string       // id of each new point segment, by index
	live   map[string]int // id -> new point segment index
	issued int            // Memory.Issued after the fresh ids
	born   []int          // new point segments that got a fresh id
	// retired previous segments: id, members at the last refit, and the
	// new segment that took most of its present members (-1 for none).
	retired []retirement
	splits  []Split
	merges  []Merged
}

type retirement struct {
	id        string
	size      int
	successor int
}

// labelSegments names the k new point segments. products[i] is in point
// segment partition[i]; prevPoint maps the products of the last refit to
// their point segment ids. The overlap table counts, for each previous
// segment (rows, in id order) and new segment (columns), the products in
// both; the Hungarian algorithm picks the pairing with the largest total
// overlap. A pair with zero overlap is no match: the new segment is born
// and the previous one retired. Splits and merges are read off the same
// table as shares of each previous segment's present members.
func labelSegments(prevPoint map[string]string, issued int, products []string, partition []int, k int, share float64) labelling {
	prevSize := make(map[string]int)
	for _, id := range prevPoint {
		prevSize[id]++
	}
	prevIDs := slices.Sorted(maps.Keys(prevSize))
	slices.SortFunc(prevIDs, compareSegmentIDs)
	row := make(map[string]int, len(prevIDs))
	for r, id := range prevIDs {
		row[id] = r
	}
	overlap := make([][]float64, len(prevIDs))
	for r := range overlap {
		overlap[r] = make([]float64, k)
	}
	present := make([]int, len(prevIDs)) // previous members still present
	for i, p := range products {
		if id, ok := prevPoint[p]; ok {
			overlap[row[id]][partition[i]]++
			present[row[id]]++
		}
	}

	lab := labelling{ids: make([]string, k), live: make(map[string]int, k), issued: issued}
	matched := make([]bool, len(prevIDs))
	if len(prevIDs) > 0 && k > 0 {
		// The table is finite and rectangular by construction.
		cols, err := AssignMax(overlap)
		if err != nil {
			panic("alerts: labelSegments: " + err.Error())
		}
		for r, c := range cols {
			if c >= 0 && overlap[r][c] > 0 {
				lab.ids[c] = prevIDs[r]
				matched[r] = true
			}
		}
	}
	for c := range lab.ids {
		if lab.ids[c] == "" {
			lab.issued++
			lab.ids[c] = SegmentID(lab.issued)
			lab.born = append(lab.born, c)
		}
		lab.live[lab.ids[c]] = c
	}
	for r, id := range prevIDs {
		if matched[r] {
			continue
		}
		succ, best := -1, 0.0
		for c, v := range overlap[r] {
			if v > best {
				succ, best = c, v
			}
		}
		lab.retired = append(lab.retired, retirement{id: id, size: prevSize[id], successor: succ})
	}

	for r, id := range prevIDs {
		if present[r] == 0 {
			continue
		}
		var sp Split
		for c, v := range overlap[r] {
			if s := v / float64(present[r]); s >= share {
				sp.Into = append(sp.Into, lab.ids[c])
				sp.Shares = append(sp.Shares, s)
			}
		}
		if len(sp.Into) >= 2 {
			sp.Segment = id
			lab.splits = append(lab.splits, sp)
		}
	}
	for c := 0; c < k; c++ {
		var mg Merged
		for r, id := range prevIDs {
			if present[r] == 0 {
				continue
			}
			if s := overlap[r][c] / float64(present[r]); s >= share {
				mg.From = append(mg.From, id)
				mg.Shares = append(mg.Shares, s)
			}
		}
		if len(mg.From) >= 2 {
			mg.Segment = lab.ids[c]
			lab.merges = append(lab.merges, mg)
		}
	}
	slices.SortFunc(lab.merges, func(a, b Merged) int { return compareSegmentIDs(a.Segment, b.Segment) })
	return lab
}
