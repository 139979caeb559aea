package category

import (
	"math/rand/v2"
	"slices"
	"strconv"
	"testing"
)

func TestCompareIDsReadingOrder(t *testing.T) {
	t.Parallel()
	want := []string{"", "A", "P-0", "P-2", "P-07", "P-7", "P-10", "P-12", "P-100", "P-100a", "P-100b", "P-1000", "P-a", "Q-1", "x9y2", "x9y10", "x10y1"}
	got := slices.Clone(want)
	r := rand.New(rand.NewPCG(1, 2))
	for trial := 0; trial < 50; trial++ {
		r.Shuffle(len(got), func(i, j int) { got[i], got[j] = got[j], got[i] })
		slices.SortFunc(got, CompareIDs)
		if !slices.Equal(got, want) {
			t.Fatalf("sorted %q, want %q", got, want)
		}
	}
}

// TestCompareIDsIsAnOrder checks, on random ids mixing letters, digits
// and leading zeros, that the order is antisymmetric, transitive and
// zero only for equal strings, and that numbered ids follow their numbers.
func TestCompareIDsIsAnOrder(t *testing.T) {
	t.Parallel()
	r := rand.New(rand.NewPCG(3, 4))
	alphabet := "ab0129-"
	id := func() string {
		b := make([]byte, r.IntN(6))
		for i := range b {
			b[i] = alphabet[r.IntN(len(alphabet))]
		}
		return string(b)
	}
	for trial := 0; trial < 20000; trial++ {
		a, b, c := id(), id(), id()
		ab, ba := CompareIDs(a, b), CompareIDs(b, a)
		if ab != -ba || (ab == 0) != (a == b) {
			t.Fatalf("CompareIDs(%q, %q) = %d, reverse %d", a, b, ab, ba)
		}
		if ab < 0 && CompareIDs(b, c) < 0 && CompareIDs(a, c) >= 0 {
			t.Fatalf("not transitive: %q < %q < %q but not %q < %q", a, b, c, a, c)
		}
	}
	for trial := 0; trial < 2000; trial++ {
		x, y := r.IntN(100000), r.IntN(100000)
		got := CompareIDs("P-"+strconv.Itoa(x), "P-"+strconv.Itoa(y))
		want := 0
		if x < y {
			want = -1
		} else if x > y {
			want = 1
		}
		if got != want {
			t.Fatalf("CompareIDs(P-%d, P-%d) = %d, want %d", x, y, got, want)
		}
	}
}
