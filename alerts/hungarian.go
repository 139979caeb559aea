package alerts

import (
	"fmt"
	"math"
)

// Assign solves the rectangular assignment problem: given cost[r][c] for
// r rows and c columns (every row the same length, every entry finite),
// it pairs min(r, c) rows with distinct columns so that the summed cost
// of the pairs is least. It returns, for each row, its column, or -1 for
// a row left out (only when there are more rows than columns).
//
// The method is the Hungarian algorithm in its shortest-augmenting-path
// form with dual potentials (Kuhn 1955; Munkres 1957; the O(n^2 m) row-
// by-row variant): each row is added in turn and joined to the current
// matching by the cheapest alternating path under reduced costs, which
// stay non-negative because the potentials are raised by the length of
// every path found. Ties are broken by the lowest column index, so the
// result depends only on the matrix.
//
// Errors wrap ErrAssign for a ragged matrix or a NaN or infinite entry.
// An empty matrix (or rows with no columns) gives all -1.
func Assign(cost [][]float64) ([]int, error) {
	rows := len(cost)
	if rows == 0 {
		return []int{}, nil
	}
	cols := len(cost[0])
	largest := 0.0
	for r, row := range cost {
		if len(row) != cols {
			return nil, fmt.Errorf("%w: cost row %d has %d columns, row 0 has %d", ErrAssign, r, len(row), cols)
		}
		for c, v := range row {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return nil, fmt.Errorf("%w: cost[%d][%d] is %v, want finite", ErrAssign, r, c, v)
			}
			largest = max(largest, math.Abs(v))
		}
	}
	// The potentials grow to sums of costs, which overflow for costs near
	// the largest float64 (found by FuzzAssignMax: reduced costs became
	// Inf - Inf). Scaling by a power of two that brings every cost into
	// [-1, 1] keeps them bounded; it is exact for every cost that stays a
	// normal number, so the assignment, ties included, is the one of the
	// unscaled matrix.
	scale := 1.0
	if largest > 1 {
		_, exp := math.Frexp(largest)
		scale = math.Ldexp(1, -exp)
	}
	out := make([]int, rows)
	if cols == 0 {
		for r := range out {
			out[r] = -1
		}
		return out, nil
	}
	if rows <= cols {
		copy(out, assignWide(rows, cols, func(r, c int) float64 { return cost[r][c] * scale }))
		return out, nil
	}
	// More rows than columns: solve the transpose, whose rows are the
	// columns, and read the pairs back.
	colRow := assignWide(cols, rows, func(r, c int) float64 { return cost[c][r] * scale })
	for r := range out {
		out[r] = -1
	}
	for c, r := range colRow {
		out[r] = c
	}
	return out, nil
}

// AssignMax is Assign for a profit matrix: it pairs rows and columns so
// that the summed profit is greatest. Errors as for Assign.
func AssignMax(profit [][]float64) ([]int, error) {
	neg := make([][]float64, len(profit))
	for r, row := range profit {
		neg[r] = make([]float64, len(row))
		for c, v := range row {
			neg[r][c] = -v
		}
	}
	return Assign(neg)
}

// assignWide solves the problem for rows <= cols, every row matched,
// with cost(r, c) finite. It returns the column of each row.
//
// Internally column index 0 is a virtual column that holds the row being
// inserted; real columns are 1..cols. rowOf[j] is the row (1-based, 0 for
// none) matched to column j, rowPot and colPot are the dual potentials,
// and for every column the search keeps the least reduced cost of
// reaching it (slack) and the column it was reached from (prev).
func assignWide(rows, cols int, cost func(r, c int) float64) []int {
	rowPot := make([]float64, rows+1)
	colPot := make([]float64, cols+1)
	rowOf := make([]int, cols+1)
	prev := make([]int, cols+1)
	slack := make([]float64, cols+1)
	done := make([]bool, cols+1)

	for r := 1; r <= rows; r++ {
		rowOf[0] = r
		for j := range slack {
			slack[j] = math.Inf(1)
			done[j] = false
		}
		at := 0 // the column whose row is expanded next
		for {
			done[at] = true
			from := rowOf[at]
			step, next := math.Inf(1), -1
			for j := 1; j <= cols; j++ {
				if done[j] {
					continue
				}
				reduced := cost(from-1, j-1) - rowPot[from] - colPot[j]
				if reduced < slack[j] {
					slack[j], prev[j] = reduced, at
				}
				if slack[j] < step {
					step, next = slack[j], j
				}
			}
			// Raise the potentials of the tree by step: reduced costs on
			// the tree stay zero and the cheapest frontier column becomes
			// tight.
			for j := 0; j <= cols; j++ {
				if done[j] {
					rowPot[rowOf[j]] += step
					colPot[j] -= step
				} else {
					slack[j] -= step
				}
			}
			at = next
			if rowOf[at] == 0 {
				break // a free column: augment along prev
			}
		}
		for at != 0 {
			back := prev[at]
			rowOf[at] = rowOf[back]
			at = back
		}
	}
	colOf := make([]int, rows)
	for j := 1; j <= cols; j++ {
		if rowOf[j] != 0 {
			colOf[rowOf[j]-1] = j - 1
		}
	}
	return colOf
}
