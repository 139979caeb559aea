package alerts

import (
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
)

// Hand-solved cases: each optimum was found by listing every assignment
// (written out in the comment) and is unique, so the assignment itself is
// checked, not only its cost.
func TestAssignHandSolved(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name string
		cost [][]float64
		want []int
	}{
		{
			// 012:4+0+2=6 021:4+5+2=11 102:1+2+2=5 120:1+5+3=9
			// 201:3+2+2=7 210:3+0+3=6 -> rows to columns 1, 0, 2.
			name: "square 3x3",
			cost: [][]float64{{4, 1, 3}, {2, 0, 5}, {3, 2, 2}},
			want: []int{1, 0, 2},
		},
		{
			// (0,1):1+4=5 (0,2):1+6=7 (1,0):2+2=4 (1,2):2+6=8
			// (2,0):3+2=5 (2,1):3+4=7 -> 1, 0.
			name: "wide 2x3",
			cost: [][]float64{{1, 2, 3}, {2, 4, 6}},
			want: []int{1, 0},
		},
		{
			// Rows 0,1: 1+1=2; rows 0,2: 1+3=4 (or 5+3); rows 1,2: 1+3=4
			// (or 5+3) -> row 2 left out.
			name: "tall 3x2",
			cost: [][]float64{{5, 1}, {1, 5}, {3, 3}},
			want: []int{1, 0, -1},
		},
		{
			// Greedy (row 0 takes its cheapest column 0) costs 1+100=101;
			// the optimum 2+3=5 needs the other pairing.
			name: "greedy fails",
			cost: [][]float64{{1, 2}, {3, 100}},
			want: []int{1, 0},
		},
		{
			// Negative entries: 0,1: -5+-5=-10; 1,0: 0+0=0.
			name: "negative",
			cost: [][]float64{{-5, 0}, {0, -5}},
			want: []int{0, 1},
		},
		{
			name: "one by one",
			cost: [][]float64{{7}},
			want: []int{0},
		},
		{
			name: "no columns",
			cost: [][]float64{{}, {}},
			want: []int{-1, -1},
		},
		{
			name: "empty",
			cost: nil,
			want: []int{},
		},
	}
	for _, tc := range cases {
		got, err := Assign(tc.cost)
		if err != nil {
			t.Errorf("%s: %v", tc.name, err)
			continue
		}
		if !slices.Equal(got, tc.want) {
			t.Errorf("%s: Assign = %v, want %v", tc.name, got, tc.want)
		}
	}
}

// An overlap table as labelSegments builds it: maximising picks the
// diagonal although row 1's largest entry is in column 2.
func TestAssignMaxOverlap(t *testing.T) {
	t.Parallel()
	// 012:95 021:73 102:65 120:66 201:7 210:30 -> the diagonal.
	profit := [][]float64{{40, 35, 0}, {5, 30, 31}, {0, 2, 25}}
	got, err := AssignMax(profit)
	if err != nil {
		t.Fatal(err)
	}
	if want := []int{0, 1, 2}; !slices.Equal(got, want) {
		t.Errorf("AssignMax = %v, want %v", got, want)
	}
}

func TestAssignErrors(t *testing.T) {
	t.Parallel()
	for name, cost := range map[string][][]float64{
		"ragged": {{1, 2}, {3}},
		"nan":    {{1, math.NaN()}},
		"inf":    {{math.Inf(-1)}},
	} {
		if _, err := Assign(cost); !errors.Is(err, ErrAssign) {
			t.Errorf("%s: error %v, want ErrAssign", name, err)
		}
	}
}

// TestAssignBruteForce compares the optimal cost with an exhaustive search
// over every injective pairing, on seeded random matrices of 1..6 rows
// and columns. Half the matrices have small integer entries, so ties are
// common; only the total cost is compared (ties allow several optima),
// within 1e-9 (sums of at most six numbers of size <= 100).
func TestAssignBruteForce(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(11, 12))
	trials := 3000
	if testing.Short() {
		trials = 500
	}
	for trial := 0; trial < trials; trial++ {
		rows, cols := 1+src.IntN(6), 1+src.IntN(6)
		cost := make([][]float64, rows)
		for r := range cost {
			cost[r] = make([]float64, cols)
			for c := range cost[r] {
				if trial%2 == 0 {
					cost[r][c] = float64(src.IntN(4))
				} else {
					cost[r][c] = 200*src.Float64() - 100
				}
			}
		}
		got, err := Assign(cost)
		if err != nil {
			t.Fatal(err)
		}
		total := checkAssignment(t, cost, got)
		best := bruteForceMin(cost)
		if math.Abs(total-best) > 1e-9 {
			t.Fatalf("trial %d: %v gives cost %v, brute force %v\ncost %v", trial, got, total, best, cost)
		}
	}
}

// checkAssignment fails unless cols pairs min(rows, cols) rows with
// distinct columns, and returns its cost.
func checkAssignment(t *testing.T, cost [][]float64, cols []int) float64 {
	t.Helper()
	if len(cols) != len(cost) {
		t.Fatalf("%d rows assigned, want %d", len(cols), len(cost))
	}
	used := map[int]bool{}
	var total float64
	paired := 0
	for r, c := range cols {
		if c < 0 {
			continue
		}
		if c >= len(cost[r]) || used[c] {
			t.Fatalf("row %d gets column %d (used twice or out of range): %v", r, c, cols)
		}
		used[c] = true
		total += cost[r][c]
		paired++
	}
	if want := min(len(cost), len(cost[0])); paired != want {
		t.Fatalf("%d pairs, want %d: %v", paired, want, cols)
	}
	return total
}

// bruteForceMin returns the least cost over every way of giving each row
// a distinct column (rows <= cols) or each column a distinct row.
func bruteForceMin(cost [][]float64) float64 {
	rows, cols := len(cost), len(cost[0])
	at := func(a, b int) float64 { return cost[a][b] }
	if rows > cols {
		rows, cols = cols, rows
		at = func(a, b int) float64 { return cost[b][a] }
	}
	used := make([]bool, cols)
	var walk func(a int) float64
	walk = func(a int) float64 {
		if a == rows {
			return 0
		}
		best := math.Inf(1)
		for b := 0; b < cols; b++ {
			if used[b] {
				continue
			}
			used[b] = true
			best = min(best, at(a, b)+walk(a+1))
			used[b] = false
		}
		return best
	}
	return walk(0)
}

func BenchmarkAssign50(b *testing.B) {
	src := rand.New(rand.NewPCG(1, 2))
	cost := make([][]float64, 50)
	for r := range cost {
		cost[r] = make([]float64, 50)
		for c := range cost[r] {
			cost[r][c] = src.Float64()
		}
	}
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := Assign(cost); err != nil {
			b.Fatal(err)
		}
	}
}

// FuzzAssign: any small finite matrix gets a valid assignment whose cost
// equals the brute-force optimum. Bytes become rows x cols entries in
// [-128, 127].
func FuzzAssign(f *testing.F) {
	f.Add(uint8(3), uint8(3), []byte{4, 1, 3, 2, 0, 5, 3, 2, 2})
	f.Add(uint8(2), uint8(3), []byte{1, 2, 3, 2, 4, 6})
	f.Add(uint8(3), uint8(2), []byte{5, 1, 1, 5, 3, 3})
	f.Fuzz(func(t *testing.T, rows, cols uint8, raw []byte) {
		r, c := 1+int(rows%6), 1+int(cols%6)
		if len(raw) < r*c {
			return
		}
		cost := make([][]float64, r)
		for i := range cost {
			cost[i] = make([]float64, c)
			for j := range cost[i] {
				cost[i][j] = float64(int8(raw[i*c+j]))
			}
		}
		got, err := Assign(cost)
		if err != nil {
			t.Fatal(err)
		}
		// Integer entries: sums are exact.
		if total, best := checkAssignment(t, cost, got), bruteForceMin(cost); total != best {
			t.Fatalf("cost %v, brute force %v for %v", total, best, cost)
		}
	})
}
