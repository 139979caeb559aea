package sequential

import (
	"math"
	"math/big"
	"math/rand/v2"
	"slices"
	"sync"
	"testing"
)

// Reference values in these tests come from three sources, named at each
// check:
//   - math/big: exp and log evaluated to about bigPrec bits by the
//     routines below (a Taylor series for exp, Newton's iteration on that
//     exp for log, ln 2 from the series sum 1/(m 2^m)). They share no code
//     or series with the table construction in fastmath.go (repeated
//     square roots and the atanh series).
//   - the Go standard library: math.Exp, math.Expm1, math.Log,
//     math.Log1p and math.Exp2, accurate to about 1 ulp where they are
//     correct. Two amd64 defects are kept out of the comparisons and
//     checked against math/big instead: math.Log of a subnormal (golang/go
//     issue 56600) and math.Exp above about 709.44, which returns +Inf.
//   - common practice: identities every libm honours (exp(0) = 1,
//     log(1) = 0) and the IEEE 754 special values.

// bigPrec is the working precision of the math/big references: 2^-200
// is far below the 2^-53 scale of the errors being measured.
const bigPrec = 200

var bigLn2 = sync.OnceValue(func() *big.Float {
	// ln 2 = sum_{m>=1} 1/(m 2^m): each term is below half the one
	// before, so after bigPrec+30 terms the remainder is below 2^-230.
	sum := new(big.Float).SetPrec(bigPrec + 30)
	pow := new(big.Float).SetPrec(bigPrec + 30).SetInt64(1)
	term := new(big.Float).SetPrec(bigPrec + 30)
	for m := 1; m <= bigPrec+30; m++ {
		pow.SetMantExp(pow, -1)
		term.Quo(pow, new(big.Float).SetInt64(int64(m)))
		sum.Add(sum, term)
	}
	return sum
})

// expBig returns e^x to about bigPrec bits (math/big): x = n ln2 + r,
// |r| <= ln2/2 (about), exp(r) = exp(r/2^10)^(2^10) with the Taylor series
// for the small argument (60 terms: the remainder is below 2^-600).
func expBig(x *big.Float) *big.Float {
	const prec = bigPrec + 30
	xf, _ := x.Float64()
	n := math.Round(xf / math.Ln2)
	r := new(big.Float).SetPrec(prec).Mul(bigLn2(), big.NewFloat(n))
	r.Sub(x, r)
	r.SetMantExp(r, -10)
	sum := new(big.Float).SetPrec(prec).SetInt64(1)
	term := new(big.Float).SetPrec(prec).SetInt64(1)
	for m := 1; m < 60; m++ {
		term.Mul(term, r)
		term.Quo(term, new(big.Float).SetInt64(int64(m)))
		sum.Add(sum, term)
	}
	for i := 0; i < 10; i++ {
		sum.Mul(sum, sum)
	}
	return sum.SetMantExp(sum, int(n))
}

// expBigF is expBig of a float64.
func expBigF(x float64) *big.Float { return expBig(new(big.Float).SetFloat64(x)) }

// logBig returns log x for finite x > 0 to about bigPrec bits
// (math/big): three Newton steps y <- y + x e^-y - 1, each of which
// squares the relative error of e^y, from a float64 start. The start is
// log(m) + e ln2 with x = m 2^e by math.Frexp, not math.Log(x), which is
// wrong for subnormal x on amd64.
func logBig(x *big.Float) *big.Float {
	const prec = bigPrec + 30
	xf, _ := x.Float64()
	m, e := math.Frexp(xf)
	y := new(big.Float).SetPrec(prec).SetFloat64(math.Log(m) + float64(e)*math.Ln2)
	for i := 0; i < 3; i++ {
		ey := expBig(new(big.Float).SetPrec(prec).Neg(y))
		ey.Mul(ey, x)
		ey.Sub(ey, big.NewFloat(1))
		y.Add(y, ey)
	}
	return y
}

// logBigF is logBig of a float64.
func logBigF(x float64) *big.Float { return logBig(new(big.Float).SetFloat64(x)) }

// ulpErr returns |got - want| in units of the spacing of float64 values
// at want (the subnormal spacing 2^-1074 for tiny want); +Inf if got is
// infinite or NaN.
func ulpErr(got float64, want *big.Float) float64 {
	if math.IsInf(got, 0) || math.IsNaN(got) {
		return math.Inf(1)
	}
	if want.Sign() == 0 {
		return math.Abs(got) / 0x1p-1074
	}
	exp := want.MantExp(nil) // |want| in [2^(exp-1), 2^exp)
	ulpExp := max(exp-53, -1074)
	d := new(big.Float).SetPrec(bigPrec).Sub(new(big.Float).SetFloat64(got), want)
	d.Abs(d)
	d.SetMantExp(d, -ulpExp)
	f, _ := d.Float64()
	return f
}

// ulpDist returns the number of float64 steps from a to b (both finite);
// +Inf if either is infinite or NaN and they differ.
func ulpDist(a, b float64) float64 {
	if a == b {
		return 0
	}
	if math.IsInf(a, 0) || math.IsInf(b, 0) || math.IsNaN(a) || math.IsNaN(b) {
		return math.Inf(1)
	}
	// Map the float64 order onto the integers: negative values below 0.
	ord := func(x float64) int64 {
		if x < 0 {
			return -int64(math.Float64bits(-x))
		}
		return int64(math.Float64bits(x))
	}
	d := ord(a) - ord(b)
	return math.Abs(float64(d))
}

// sameFloat reports whether got is want, NaN matching NaN and the sign
// of zero mattering only if signed.
func sameFloat(got, want float64, signed bool) bool {
	if math.IsNaN(want) {
		return math.IsNaN(got)
	}
	if got != want {
		return false
	}
	return !signed || math.Signbit(got) == math.Signbit(want)
}

// fastDenseN is the number of random arguments per range in the comparisons
// with the standard library; fastBigN the number of math/big comparisons.
func fastDenseN() int {
	if testing.Short() {
		return 1 << 20
	}
	return 1 << 24
}

func fastBigN() int {
	if testing.Short() {
		return 1500
	}
	return 20000
}

// argSampler draws arguments for one range of a comparison.
type argSampler struct {
	name string
	draw func(rng *rand.Rand) float64
}

func argUniform(lo, hi float64) func(*rand.Rand) float64 {
	return func(rng *rand.Rand) float64 { return lo + (hi-lo)*rng.Float64() }
}

// argSignedPow2 draws ±2^u, u uniform in [lo, hi]: dense near 0 at every
// scale.
func argSignedPow2(lo, hi float64) func(*rand.Rand) float64 {
	return func(rng *rand.Rand) float64 {
		v := math.Exp2(lo + (hi-lo)*rng.Float64())
		if rng.IntN(2) == 0 {
			return -v
		}
		return v
	}
}

// argBits draws float64 values with bit patterns uniform between
// those of lo and hi (0 <= lo < hi): every binade gets the same share.
func argBits(lo, hi float64) func(*rand.Rand) float64 {
	a, b := math.Float64bits(lo), math.Float64bits(hi)
	return func(rng *rand.Rand) float64 { return math.Float64frombits(a + rng.Uint64N(b-a+1)) }
}

// checkAgainstMath compares f with the standard library's g on fastDenseN
// random arguments per sampler and fails if any result is more than
// maxUlps float64 steps away.
func checkAgainstMath(t *testing.T, name string, f, g func(float64) float64, maxUlps float64, samplers []argSampler) {
	t.Helper()
	rng := rand.New(rand.NewPCG(11, uint64(len(name))))
	for _, s := range samplers {
		worst, worstX := 0.0, 0.0
		for i := 0; i < fastDenseN(); i++ {
			x := s.draw(rng)
			if d := ulpDist(f(x), g(x)); d > worst || math.IsNaN(d) {
				worst, worstX = d, x
			}
		}
		t.Logf("%s %s: at most %v ulp from the standard library (at %v)", name, s.name, worst, worstX)
		if !(worst <= maxUlps) {
			t.Errorf("%s %s: %s(%v) = %v, standard library %v: %v ulp apart, want <= %v",
				name, s.name, name, worstX, f(worstX), g(worstX), worst, maxUlps)
		}
	}
}

// checkAgainstBig compares f with the math/big value exact(x) on fastBigN
// random arguments per sampler and fails if any error exceeds maxUlps.
func checkAgainstBig(t *testing.T, name string, f func(float64) float64, exact func(float64) *big.Float, maxUlps float64, samplers []argSampler) {
	t.Helper()
	rng := rand.New(rand.NewPCG(13, uint64(len(name))))
	for _, s := range samplers {
		worst, worstX := 0.0, 0.0
		for i := 0; i < fastBigN(); i++ {
			x := s.draw(rng)
			if e := ulpErr(f(x), exact(x)); e > worst || math.IsNaN(e) {
				worst, worstX = e, x
			}
		}
		t.Logf("%s %s: error at most %.3f ulp against math/big (at %v)", name, s.name, worst, worstX)
		if !(worst <= maxUlps) {
			t.Errorf("%s %s: %s(%v) = %v is %.3f ulp from the math/big value, want <= %v",
				name, s.name, name, worstX, f(worstX), worst, maxUlps)
		}
	}
}

// The accuracy bounds asserted against math/big are the analysed error
// of each routine (one final rounding, 0.5 ulp, plus what the text of
// fastmath.go accounts for) with a small margin; the requirement on the
// comparisons with the standard library, which has errors of its own,
// is 2 ulp.
const (
	expMaxUlps   = 0.55 // 0.5 + table, reduction and polynomial terms < 0.02
	expm1MaxUlps = 0.8  // 0.75 for x < -ln2 (see expm1Fast) + < 0.02
	logMaxUlps   = 0.55 // 0.5 + small-term roundings < 0.04
	log1pMaxUlps = 0.8  // as logFast, + up to 0.25 from rounding c/u where |x| ~ 2^-52
	stdMaxUlps   = 2
)

// TestFastExpTable checks expTab and the reduction constants against
// independent math/big values.
func TestFastExpTable(t *testing.T) {
	t.Parallel()
	for j, e := range expTab {
		hi, lo := e[0], e[1]
		// (hi + lo)^N must be 2^j (math/big): hi + lo within 2^-100 of
		// 2^(j/N) makes the power within N*2^-100 = 2^-93 relative.
		v := new(big.Float).SetPrec(bigPrec).SetFloat64(hi)
		v.Add(v, big.NewFloat(lo))
		for i := 0; i < expTableBits; i++ {
			v.Mul(v, v)
		}
		v.Quo(v, new(big.Float).SetMantExp(big.NewFloat(1), j))
		v.Sub(v, big.NewFloat(1))
		if f, _ := v.Float64(); math.Abs(f) > 0x1p-93 {
			t.Errorf("expTab[%d]: (hi+lo)^%d / 2^%d - 1 = %v (math/big), want below 2^-93", j, expN, j, f)
		}
		// hi is the float64 nearest 2^(j/N), so |lo| <= ulp(hi)/2, and
		// math.Exp2 (standard library, ~1 ulp) agrees within 1 ulp.
		if math.Abs(lo) > (math.Nextafter(hi, 2)-hi)/2 {
			t.Errorf("expTab[%d]: tail %v exceeds half an ulp of head %v", j, lo, hi)
		}
		if d := ulpDist(hi, math.Exp2(float64(j)/expN)); d > 1 {
			t.Errorf("expTab[%d]: head %v is %v ulp from math.Exp2(%d/%d) = %v", j, hi, d, j, expN, math.Exp2(float64(j)/expN))
		}
	}
	// kd*expStepHi is exact for |kd| < 2^18 only if expStepHi has at
	// most 35 significant bits.
	if m := math.Float64bits(expStepHi) & (1<<18 - 1); m != 0 {
		t.Errorf("expStepHi = %v has more than 35 significant bits", expStepHi)
	}
	// expStepHi + expStepLo = ln2/N and ln2Hi + ln2Lo = ln2 (math/big
	// ln 2) to the precision of a 35-bit (42-bit) head plus a float64
	// tail, 2^-88 (2^-95) relative: errors of 2^17*2^-88*ln2/N and
	// 1075*2^-95*ln2 in k*ln2, far below an ulp of the results.
	for _, c := range []struct {
		name   string
		hi, lo float64
		div    int64
		tol    float64
	}{{"expStep", expStepHi, expStepLo, expN, 0x1p-87}, {"ln2", ln2Hi, ln2Lo, 1, 0x1p-94}} {
		want := new(big.Float).SetPrec(bigPrec).Quo(bigLn2(), new(big.Float).SetInt64(c.div))
		got := new(big.Float).SetPrec(bigPrec).SetFloat64(c.hi)
		got.Add(got, big.NewFloat(c.lo))
		got.Sub(got, want).Quo(got, want)
		if f, _ := got.Float64(); math.Abs(f) > c.tol {
			t.Errorf("%s: hi + lo is off by %v relative (math/big), want below %v", c.name, f, c.tol)
		}
	}
	if r := math.Ldexp(ln2Hi, 42); r != math.Trunc(r) {
		t.Errorf("ln2Hi = %v is not on the 2^-42 grid", ln2Hi)
	}
}

// TestFastLogTable checks logTab: c_j has at most 8 significant bits,
// |c_j*y - 1| < 2^-7 on the whole subinterval (the exactness condition
// of r), c = 1 on the subinterval holding 1, and head + tail = log c_j
// (math/big).
func TestFastLogTable(t *testing.T) {
	t.Parallel()
	for j, e := range logTab {
		c, head, tail := e[0], e[1], e[2]
		if m, _ := math.Frexp(c); c <= 0 || math.Ldexp(m, 8) != math.Trunc(math.Ldexp(m, 8)) {
			t.Errorf("logTab[%d]: c = %v is not positive with at most 8 significant bits", j, c)
		}
		lo, hi := logRange(j)
		last := math.Nextafter(hi, 0) // largest y of the subinterval
		for _, y := range []float64{lo, last} {
			r := new(big.Float).SetPrec(bigPrec).SetFloat64(c)
			r.Mul(r, big.NewFloat(y)).Sub(r, big.NewFloat(1))
			if f, _ := r.Float64(); !(math.Abs(f) < 0x1p-7) {
				t.Errorf("logTab[%d]: c*y - 1 = %v at y = %v, want |.| < 2^-7", j, f, y)
			}
		}
		if lo <= 1 && 1 <= last && c != 1 {
			t.Errorf("logTab[%d]: subinterval [%v, %v) holds 1 but c = %v, want 1", j, lo, hi, c)
		}
		if r := math.Ldexp(head, 42); r != math.Trunc(r) {
			t.Errorf("logTab[%d]: head %v is not on the 2^-42 grid", j, head)
		}
		if c == 1 {
			if head != 0 || tail != 0 {
				t.Errorf("logTab[%d]: log 1 stored as %v + %v", j, head, tail)
			}
			continue
		}
		want := logBigF(c)
		got := new(big.Float).SetPrec(bigPrec).SetFloat64(head)
		got.Add(got, big.NewFloat(tail))
		got.Sub(got, want).Quo(got, want)
		if f, _ := got.Float64(); math.Abs(f) > 0x1p-90 {
			t.Errorf("logTab[%d]: head + tail = log(%v) off by %v relative (math/big), want below 2^-90", j, c, f)
		}
	}
	// The subintervals tile [logOff, 2 logOff) without gaps.
	if lo, _ := logRange(0); lo != 0.708984375 {
		t.Errorf("logRange(0) starts at %v, want 0.708984375", lo)
	}
	if _, hi := logRange(logN - 1); hi != 2*0.708984375 {
		t.Errorf("logRange(%d) ends at %v, want %v", logN-1, hi, 2*0.708984375)
	}
}

// TestFastExpSpecial checks exact and special values of expFast.
func TestFastExpSpecial(t *testing.T) {
	t.Parallel()
	cases := []struct {
		x, want float64
		source  string
	}{
		{0, 1, "common practice"},
		{math.Copysign(0, -1), 1, "common practice"},
		{math.Inf(1), math.Inf(1), "IEEE 754"},
		{math.Inf(-1), 0, "IEEE 754"},
		{math.NaN(), math.NaN(), "IEEE 754"},
		{math.Nextafter(expOverflow, 1000), math.Inf(1), "math/big: exp exceeds MaxFloat64 by more than half an ulp"},
		{710, math.Inf(1), "math/big: exp(710) > MaxFloat64"},
		{1e300, math.Inf(1), "IEEE 754 overflow"},
		// exp(-745) = 0.57 * 2^-1074 and exp(-746) = 0.21 * 2^-1074
		// (math/big), rounding to the smallest subnormal and to 0.
		{-745, 0x1p-1074, "math/big"},
		{-746, 0, "math/big"},
		{-1e300, 0, "IEEE 754 underflow"},
	}
	for _, c := range cases {
		if got := expFast(c.x); !sameFloat(got, c.want, false) {
			t.Errorf("expFast(%v) = %v, want %v (%s)", c.x, got, c.want, c.source)
		}
	}
	// exp(1) within 1 ulp of math.E (standard library constant).
	if d := ulpDist(expFast(1), math.E); d > 1 {
		t.Errorf("expFast(1) = %v, %v ulp from math.E = %v", expFast(1), d, math.E)
	}
	// Near the ends of the range the result is within 1 ulp of the
	// math/big value: finite up to expOverflow, and correctly rounded
	// to within one subnormal step below 2^-1022.
	for _, x := range []float64{expOverflow, 709.5, 709.78, -708.5, -720, -740, -745.1, -745.13} {
		if e := ulpErr(expFast(x), expBigF(x)); !(e <= 1) {
			t.Errorf("expFast(%v) = %v is %.3f ulp from the math/big value, want <= 1", x, expFast(x), e)
		}
	}
}

// TestFastExpAccuracy compares expFast with math.Exp over [-745, 709]
// and with math/big values, on uniform samples, near 0, and on the edge
// ranges.
func TestFastExpAccuracy(t *testing.T) {
	t.Parallel()
	checkAgainstMath(t, "expFast", expFast, math.Exp, stdMaxUlps, []argSampler{
		{"[-745, 709]", argUniform(-745, 709)},
		{"[-40, 40]", argUniform(-40, 40)},
		{"near 0", argSignedPow2(-70, 0)},
	})
	checkAgainstBig(t, "expFast", expFast, expBigF, expMaxUlps, []argSampler{
		{"[-708, 708]", argUniform(-708, 708)},
		{"[-2, 2]", argUniform(-2, 2)},
		{"near 0", argSignedPow2(-70, 0)},
		{"(708, 709.78]", argUniform(708, expOverflow)},
	})
	// Subnormal results carry one rounding to the coarse subnormal grid
	// after y is rounded: up to one subnormal step.
	checkAgainstBig(t, "expFast", expFast, expBigF, 1, []argSampler{
		{"[-745.13, -708]", argUniform(-745.13, -708)},
	})
}

// TestFastExpm1 checks expm1Fast: special values, and accuracy against
// math.Expm1 and math/big, with emphasis on x <= 0, the arguments -z of
// the likelihood.
func TestFastExpm1(t *testing.T) {
	t.Parallel()
	cases := []struct {
		x, want float64
		signed  bool
		source  string
	}{
		{0, 0, true, "common practice"},
		{1e-300, 1e-300, true, "math/big: x + x^2/2 rounds to x"},
		{-1e-300, -1e-300, true, "math/big: x + x^2/2 rounds to x"},
		{-40, -1, true, "math/big: -1 + 4.2e-18 rounds to -1"},
		{-1000, -1, true, "math/big"},
		{math.Inf(-1), -1, true, "IEEE 754"},
		{math.Inf(1), math.Inf(1), true, "IEEE 754"},
		{math.NaN(), math.NaN(), false, "IEEE 754"},
		{1000, math.Inf(1), true, "IEEE 754 overflow"},
	}
	for _, c := range cases {
		if got := expm1Fast(c.x); !sameFloat(got, c.want, c.signed) {
			t.Errorf("expm1Fast(%v) = %v, want %v (%s)", c.x, got, c.want, c.source)
		}
	}
	checkAgainstMath(t, "expm1Fast", expm1Fast, math.Expm1, stdMaxUlps, []argSampler{
		{"[-50, 0]", argUniform(-50, 0)},
		{"[-1, 1]", argUniform(-1, 1)},
		{"[-50, 709]", argUniform(-50, 709)},
		{"near 0", argSignedPow2(-70, 0)},
	})
	expm1Big := func(x float64) *big.Float {
		e := expBigF(x)
		return e.Sub(e, big.NewFloat(1))
	}
	checkAgainstBig(t, "expm1Fast", expm1Fast, expm1Big, expm1MaxUlps, []argSampler{
		{"[-40, 0]", argUniform(-40, 0)},
		{"[-1, 1]", argUniform(-1, 1)},
		{"[-0.1, 0.1]", argUniform(-0.1, 0.1)},
		{"[0, 40]", argUniform(0, 40)},
		{"near 0", argSignedPow2(-70, 0)},
	})
}

// TestFastLogSpecial checks exact and special values of logFast.
func TestFastLogSpecial(t *testing.T) {
	t.Parallel()
	cases := []struct {
		x, want float64
		source  string
	}{
		{1, 0, "common practice"},
		{0, math.Inf(-1), "IEEE 754"},
		{math.Copysign(0, -1), math.Inf(-1), "IEEE 754"},
		{-1, math.NaN(), "IEEE 754"},
		{-0x1p-1074, math.NaN(), "IEEE 754"},
		{math.Inf(-1), math.NaN(), "IEEE 754"},
		{math.Inf(1), math.Inf(1), "IEEE 754"},
		{math.NaN(), math.NaN(), "IEEE 754"},
		// log(1 - 2^-53) = -2^-53 - 2^-107 - ... rounds to -2^-53
		// (series of log(1-u), common practice).
		{1 - 0x1p-53, -0x1p-53, "common practice (series)"},
		{2, math.Ln2, "math.Ln2 of the standard library, correctly rounded"},
		{0.5, -math.Ln2, "math.Ln2 of the standard library, correctly rounded"},
	}
	for _, c := range cases {
		if got := logFast(c.x); !sameFloat(got, c.want, false) {
			t.Errorf("logFast(%v) = %v, want %v (%s)", c.x, got, c.want, c.source)
		}
	}
	// log(e) within 1 ulp of 1 (math.E of the standard library is
	// within half an ulp of e, which moves log by less than that).
	if d := ulpDist(logFast(math.E), 1); d > 1 {
		t.Errorf("logFast(math.E) = %v, %v ulp from 1", logFast(math.E), d)
	}
	// Extremes and subnormals against math/big.
	for _, x := range []float64{0x1p-1074, 3e-320, 1e-310, 0x1p-1022, math.Nextafter(0x1p-1022, 0), math.MaxFloat64, 1 + 0x1p-52} {
		if e := ulpErr(logFast(x), logBigF(x)); !(e <= logMaxUlps) {
			t.Errorf("logFast(%v) = %v is %.3f ulp from the math/big value, want <= %v", x, logFast(x), e, logMaxUlps)
		}
	}
}

// TestFastLogAccuracy compares logFast with math.Log over the normal
// range (0, 1e308] and with math/big values, including subnormals and
// the neighbourhood of 1.
func TestFastLogAccuracy(t *testing.T) {
	t.Parallel()
	near1 := argUniform(1-1.0/64, 1+1.0/64)
	checkAgainstMath(t, "logFast", logFast, math.Log, stdMaxUlps, []argSampler{
		{"normal range to 1e308, every binade", argBits(0x1p-1022, 1e308)},
		{"(0, 1]", argUniform(0, 1)},
		{"[1, 1e6]", argUniform(1, 1e6)},
		{"1 ± 1/64", near1},
		{"1 + tiny", func(rng *rand.Rand) float64 { return 1 + argSignedPow2(-52, -7)(rng) }},
	})
	checkAgainstBig(t, "logFast", logFast, logBigF, logMaxUlps, []argSampler{
		{"(0, 1e308], every binade", argBits(0x1p-1074, 1e308)},
		{"subnormal", argBits(0x1p-1074, 0x1p-1022)},
		{"[0.5, 2]", argUniform(0.5, 2)},
		{"1 ± 1/64", near1},
		{"1 + tiny", func(rng *rand.Rand) float64 { return 1 + argSignedPow2(-52, -7)(rng) }},
	})
}

// TestFastLog1p checks log1pFast on the arguments of Log1mExp, -e for
// e = exp(-z) in (0, 1/2], and more widely.
func TestFastLog1p(t *testing.T) {
	t.Parallel()
	cases := []struct {
		x, want float64
		signed  bool
		source  string
	}{
		{0, 0, true, "common practice"},
		{math.Copysign(0, -1), math.Copysign(0, -1), true, "common practice"},
		{1e-300, 1e-300, true, "math/big: x - x^2/2 rounds to x"},
		{-1e-300, -1e-300, true, "math/big: x - x^2/2 rounds to x"},
		{-1, math.Inf(-1), true, "IEEE 754"},
		{-2, math.NaN(), false, "IEEE 754"},
		{math.Inf(1), math.Inf(1), true, "IEEE 754"},
		{math.NaN(), math.NaN(), false, "IEEE 754"},
		{-0.5, -math.Ln2, true, "math.Ln2 of the standard library, correctly rounded"},
		{1, math.Ln2, true, "math.Ln2 of the standard library, correctly rounded"},
	}
	for _, c := range cases {
		if got := log1pFast(c.x); !sameFloat(got, c.want, c.signed) {
			t.Errorf("log1pFast(%v) = %v, want %v (%s)", c.x, got, c.want, c.source)
		}
	}
	minusExp := func(rng *rand.Rand) float64 { return -math.Exp(-(math.Ln2 + 50*rng.Float64())) }
	checkAgainstMath(t, "log1pFast", log1pFast, math.Log1p, stdMaxUlps, []argSampler{
		{"-exp(-z), z in [ln2, ln2+50]", minusExp},
		{"[-1, 1]", argUniform(-1, 1)},
		{"[1, 1e10]", argUniform(1, 1e10)},
		{"near 0", argSignedPow2(-70, -1)},
	})
	log1pBig := func(x float64) *big.Float {
		u := new(big.Float).SetPrec(bigPrec).SetFloat64(x)
		return logBig(u.Add(u, big.NewFloat(1)))
	}
	checkAgainstBig(t, "log1pFast", log1pFast, log1pBig, log1pMaxUlps, []argSampler{
		{"-exp(-z), z in [ln2, ln2+50]", minusExp},
		{"[-1, 1]", argUniform(-1, 1)},
		{"near 0", argSignedPow2(-70, -1)},
	})
}

// valueLogLikStd is valueLogLik evaluated in one pass with math.Exp,
// math.Expm1 and math.Log, as the package computed it before the table
// routines: the reference for TestValueLogLikFastMatchesStd and the
// baseline of BenchmarkValueLogLikStd.
func valueLogLikStd(d *Datum, kn *kernel) float64 {
	n := len(d.logY)
	if n == 0 {
		return 0
	}
	var sumLx, sumZ, logAcc, lgLast float64
	prod := 1.0
	for m, ly := range d.logY {
		lx := ly - kn.logS
		t := kn.k * lx
		z := math.Exp(t)
		sumLx += lx
		sumZ += z
		if t < -30 {
			lg := t - 0.5*z
			logAcc += lg
			lgLast = lg
			continue
		}
		var g float64
		if z <= math.Ln2 {
			g = -math.Expm1(-z)
		} else {
			g = 1 - math.Exp(-z)
		}
		if m == n-1 {
			lgLast = math.Log(g)
		}
		prod *= g
		if prod < 1e-280 {
			logAcc += math.Log(prod)
			prod = 1
		}
	}
	sumLG := logAcc + math.Log(prod)
	return d.logFall + float64(n)*kn.lnorm + (kn.k-1)*sumLx - sumZ + (kn.a-1)*sumLG + float64(d.l-n)*kn.a*lgLast
}

// valueLogLikScale returns the sum of the magnitudes of the terms of the
// value log likelihood: each term is computed to a few ulps, so the
// rounding of the total is a small multiple of eps times this.
func valueLogLikScale(d *Datum, kn *kernel) float64 {
	n := len(d.logY)
	s := math.Abs(d.logFall) + float64(n)*math.Abs(kn.lnorm)
	var lgLast float64
	for _, ly := range d.logY {
		lx := ly - kn.logS
		z := math.Exp(kn.k * lx)
		lgLast = math.Log(-math.Expm1(-z))
		if kn.k*lx < -30 {
			lgLast = kn.k*lx - 0.5*z
		}
		s += math.Abs((kn.k-1)*lx) + z + math.Abs((kn.a-1)*lgLast)
	}
	return s + float64(d.l-n)*kn.a*math.Abs(lgLast)
}

// TestValueLogLikFastMatchesStd compares valueLogLik (table routines, two
// passes in blocks) with valueLogLikStd on random data and segments,
// including n across several blocks, values far below the scale (t <
// -30), far above it (G = 1), and runs of small G that fold the running
// product. A wrong block index, a lost value or a misplaced last value
// changes the result by far more than the tolerance.
func TestValueLogLikFastMatchesStd(t *testing.T) {
	t.Parallel()
	rng := rand.New(rand.NewPCG(21, 22))
	trials := 4000
	if testing.Short() {
		trials = 1000
	}
	worst := 0.0
	for trial := 0; trial < trials; trial++ {
		n := 1 + rng.IntN(40)
		if trial%10 == 0 {
			n = []int{15, 16, 17, 31, 32, 33, 48}[trial/10%7]
		}
		l := n + rng.IntN(MaxCompetitors-n+1)
		vals := make([]float64, n)
		for i := range vals {
			vals[i] = math.Exp(-12 + 15*rng.Float64())
		}
		if trial%7 == 0 {
			// Many tiny values: G ~ z ~ 1e-13 each, so the product
			// folds every ~21 values.
			for i := range vals {
				vals[i] = 1e-6 * (1 + rng.Float64())
			}
		}
		slices.Sort(vals)
		slices.Reverse(vals)
		d := MustDatum(vals, l)
		th := Theta{LogA: -2 + 5*rng.Float64(), LogK: -1.5 + 4*rng.Float64(), LogS: -3 + 5*rng.Float64()}
		if trial%7 == 0 {
			th = Theta{LogA: rng.Float64(), LogK: math.Log(2.2), LogS: 0}
		}
		kn := th.kernel()
		got, want := d.valueLogLik(&kn), valueLogLikStd(&d, &kn)
		scale := valueLogLikScale(&d, &kn)
		// 64 eps of the term magnitudes: each of the n per-value terms
		// and the sums over them carry a few roundings in both versions.
		r := math.Abs(got-want) / (eps * scale)
		worst = max(worst, r)
		if !(r <= 64) {
			t.Errorf("n=%d L=%d %+v: valueLogLik = %.17g, math version %.17g (diff %.3g = %.1f eps of scale %.3g)",
				n, l, th, got, want, got-want, r, scale)
		}
	}
	t.Logf("largest difference: %.2f eps of the term magnitudes", worst)
}

// BenchmarkValueLogLikStd times valueLogLikStd on BenchmarkValueLogLik's
// datum and segment, for a comparison within one run.
func BenchmarkValueLogLikStd(b *testing.B) {
	d := MustDatum([]float64{1.1, 0.8, 0.8, 0.35, 0.05}, 10)
	th := Theta{LogA: math.Log(2.5), LogK: math.Log(2.2), LogS: math.Log(0.3)}
	var s float64
	for b.Loop() {
		kn := th.kernel()
		s += valueLogLikStd(&d, &kn)
	}
	benchSink = s
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(d.N()), "ns/value")
}

// benchArgs returns 1024 arguments spread over [lo, hi] (uniformly, or
// log-uniformly if logScale) in a fixed pseudo-random order, so that the
// benchmark loop does not train the branch predictor on a pattern.
func benchArgs(lo, hi float64, logScale bool) []float64 {
	rng := rand.New(rand.NewPCG(7, 8))
	xs := make([]float64, 1024)
	for i := range xs {
		if logScale {
			xs[i] = math.Exp(math.Log(lo) + (math.Log(hi)-math.Log(lo))*rng.Float64())
		} else {
			xs[i] = lo + (hi-lo)*rng.Float64()
		}
	}
	return xs
}

// benchUnary reports the time per call of f over xs.
func benchUnary(b *testing.B, f func(float64) float64, xs []float64) {
	var s float64
	for b.Loop() {
		for _, x := range xs {
			s += f(x)
		}
	}
	benchSink = s
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(len(xs)), "ns/call")
}

// The pairs below time the fast routines and their math counterparts on
// the same arguments: the range of k*log(y/s) in valueLogLik for exp,
// of -z for expm1, and of the G factors and their products for log.

func BenchmarkFastExp(b *testing.B)   { benchUnary(b, expFast, benchArgs(-30, 10, false)) }
func BenchmarkMathExp(b *testing.B)   { benchUnary(b, math.Exp, benchArgs(-30, 10, false)) }
func BenchmarkFastExpm1(b *testing.B) { benchUnary(b, expm1Fast, benchArgs(-20, 0, false)) }
func BenchmarkMathExpm1(b *testing.B) { benchUnary(b, math.Expm1, benchArgs(-20, 0, false)) }
func BenchmarkFastLog(b *testing.B)   { benchUnary(b, logFast, benchArgs(1e-300, 1, true)) }
func BenchmarkMathLog(b *testing.B)   { benchUnary(b, math.Log, benchArgs(1e-300, 1, true)) }
func BenchmarkFastLog1p(b *testing.B) { benchUnary(b, log1pFast, benchArgs(-0.5, -1e-12, false)) }
func BenchmarkMathLog1p(b *testing.B) { benchUnary(b, math.Log1p, benchArgs(-0.5, -1e-12, false)) }
