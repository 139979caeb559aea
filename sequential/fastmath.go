package sequential

import (
	"math"
	"math/big"
)

// Table-driven elementary functions for the likelihood's inner loop.
//
// expFast and expm1Fast use Tang's table-driven reduction: with N = 128,
//
//	x = (k*N + j)*ln2/N + r,  0 <= j < N,  |r| <= ln2/(2N),
//	exp(x) = 2^k * 2^(j/N) * exp(r),
//
// where 2^(j/N) is held as a pair hi + lo (hi the nearest float64, lo the
// rest to about 2^-106) and exp(r) - 1 is a degree-5 Taylor polynomial
// (truncation below r^6/720 < 6e-19 relative). The small terms are summed
// first and hi added last, so the result carries one final rounding plus
// a few hundredths of an ulp.
//
// logFast uses a table-driven reduction with a reciprocal table: with
// x = 2^k * y, y in [0.709, 1.418), and c_j an 8-bit approximation of
// 1/y on the j-th of 128 subintervals,
//
//	log x = k*ln2 - log c_j + log1p(r),  r = c_j*y - 1,  |r| < 2^-7,
//
// where r is computed exactly (c_j has 8 significant bits, y is split
// into a 45-bit head and an 8-bit tail, so every product is exact) and
// log1p(r) is a degree-8 Taylor polynomial. The subinterval holding 1 has
// c_j = 1, so near x = 1 the result is r plus a polynomial, accurate
// relative to its own small size. k*ln2 and log c_j are split into heads
// on a 2^-42 grid, whose sum is exact, and tails.
//
// The tables are built at package initialisation (in about 1 ms) from
// math/big values of 2^(j/N) (repeated square roots) and log c_j (the
// atanh series); the tests check them against independent math/big
// computations.

const (
	expTableBits = 7
	expN         = 1 << expTableBits
	// expInvStep is N/ln2; any nearby value gives a valid reduction.
	expInvStep = expN / math.Ln2
	// expShift is 1.5*2^52: adding it rounds a float64 of magnitude
	// below 2^51 to an integer, held in the low bits of the sum.
	expShift = 0x1.8p52
	// expFastMax bounds |x| on the main path: there exp(x) is a normal
	// float64 and 2^k is representable, so one scaling is exact.
	expFastMax = 708
	// expOverflow is the largest float64 x with exp(x) below
	// math.MaxFloat64 (ln of it is 1024 ln2 - 2^-53, about
	// 709.7827128933839967); above it exp(x) rounds to +Inf.
	expOverflow = 709.782712893383973096
	// expUnderflow: exp(x) < 2^-1075 for x below it (1075 ln2 is about
	// 745.1332), so exp(x) rounds to 0.
	expUnderflow = -745.2
	// expm1PolyMax bounds |x| where expm1Fast uses its direct series.
	expm1PolyMax = 1.0 / 32
	// expm1NegOne: below it, exp(x) < 2^-57 and expm1(x) rounds to -1.
	expm1NegOne = -40
	// expm1Max: above it expm1Fast defers to math.Expm1 (the result
	// exceeds 4e15 and equals exp(x) to within an ulp).
	expm1Max = 36

	logTableBits = 7
	logN         = 1 << logTableBits
	// logOff is the bit pattern of the lower end of the reduced range,
	// 0.708984375 (= 2^-1 * (1 + 107/256)). 1.0 lies half a subinterval
	// above the start of subinterval 74, so that subinterval straddles 1.
	logOff = 0x3FE6B00000000000
	// logTailBits is the number of low mantissa bits split off y so that
	// an 8-bit c times the 45-bit head is exact.
	logTailBits = 8
)

var (
	// expTab[j] = {hi, lo}: hi + lo = 2^(j/expN) to about 2^-106.
	expTab [expN][2]float64
	// ln2/expN = expStepHi + expStepLo; expStepHi has 35 significant
	// bits (the 2^-42 grid) so kd*expStepHi is exact for |kd| < 2^18,
	// which covers |x| < 1400.
	expStepHi, expStepLo float64

	// logTab[j] = {c, head, tail, 0}: c_j has at most 8 significant
	// bits; head + tail = log c_j to about 2^-95, head on the 2^-42 grid.
	logTab [logN][4]float64
	// ln2 = ln2Hi + ln2Lo, ln2Hi on the 2^-42 grid, so k*ln2Hi is exact
	// for |k| < 2^11.
	ln2Hi, ln2Lo float64
)

func init() { buildFastTables() }

// fastTablePrec is the math/big working precision for the tables.
const fastTablePrec = 160

func buildFastTables() {
	// 2^(j/N): the N-th root of 2 by repeated square roots, then powers.
	root := new(big.Float).SetPrec(fastTablePrec).SetInt64(2)
	for i := 0; i < expTableBits; i++ {
		root.Sqrt(root)
	}
	p := new(big.Float).SetPrec(fastTablePrec).SetInt64(1)
	for j := 0; j < expN; j++ {
		expTab[j][0], expTab[j][1] = splitBig(p)
		p.Mul(p, root)
	}

	ln2 := bigLog(big.NewFloat(2), big.NewFloat(1))
	step := new(big.Float).SetPrec(fastTablePrec).Quo(ln2, big.NewFloat(expN))
	expStepHi, expStepLo = splitBigGrid(step, -42)
	ln2Hi, ln2Lo = splitBigGrid(ln2, -42)

	// log c_j from its neighbour's: log c_j = log c_i + log(c_j/c_i),
	// whose series converges in a few terms, walking out from the
	// subinterval holding 1, where c = 1.
	var one int
	for j := 0; j < logN; j++ {
		logTab[j][0] = logCenterRecip(j)
		if logTab[j][0] == 1 {
			one = j
		}
	}
	logs := make([]*big.Float, logN)
	logs[one] = new(big.Float).SetPrec(fastTablePrec)
	for j := one + 1; j < logN; j++ {
		logs[j] = bigLog(big.NewFloat(logTab[j][0]), big.NewFloat(logTab[j-1][0]))
		logs[j].Add(logs[j], logs[j-1])
	}
	for j := one - 1; j >= 0; j-- {
		logs[j] = bigLog(big.NewFloat(logTab[j][0]), big.NewFloat(logTab[j+1][0]))
		logs[j].Add(logs[j], logs[j+1])
	}
	for j, l := range logs {
		logTab[j][1], logTab[j][2] = splitBigGrid(l, -42)
	}
}

// logRange returns the reduced interval [lo, hi) of logFast's subinterval j.
func logRange(j int) (lo, hi float64) {
	return math.Float64frombits(logOff + uint64(j)<<(52-logTableBits)),
		math.Float64frombits(logOff + uint64(j+1)<<(52-logTableBits))
}

// logCenterRecip returns c_j: 1/(midpoint of subinterval j) rounded to 8
// significant bits; exactly 1 on the subinterval holding 1.
func logCenterRecip(j int) float64 {
	lo, hi := logRange(j)
	if lo <= 1 && 1 < hi {
		return 1
	}
	m, e := math.Frexp(2 / (lo + hi)) // m in [0.5, 1)
	return math.Ldexp(math.Round(m*256)/256, e)
}

// splitBig returns the float64 nearest to v and the float64 nearest to
// the remainder.
func splitBig(v *big.Float) (hi, lo float64) {
	hi, _ = v.Float64()
	rest := new(big.Float).SetPrec(fastTablePrec).Sub(v, big.NewFloat(hi))
	lo, _ = rest.Float64()
	return hi, lo
}

// splitBigGrid returns hi, the multiple of 2^e nearest to v, and the
// float64 nearest to v - hi.
func splitBigGrid(v *big.Float, e int) (hi, lo float64) {
	f, _ := v.Float64()
	hi = math.Ldexp(math.Round(math.Ldexp(f, -e)), e)
	rest := new(big.Float).SetPrec(fastTablePrec).Sub(v, big.NewFloat(hi))
	lo, _ = rest.Float64()
	return hi, lo
}

// bigLog returns log(x/y) for x, y > 0 (x/y in about [0.5, 2] for fast
// convergence) by the series log(x/y) = 2 atanh(v), v = (x-y)/(x+y):
// 2 * sum_m v^(2m+1)/(2m+1), summed until the terms fall below
// 2^-fastTablePrec.
func bigLog(x, y *big.Float) *big.Float {
	num := new(big.Float).SetPrec(fastTablePrec).Sub(x, y)
	den := new(big.Float).SetPrec(fastTablePrec).Add(x, y)
	v := new(big.Float).SetPrec(fastTablePrec).Quo(num, den)
	v2 := new(big.Float).SetPrec(fastTablePrec).Mul(v, v)
	sum := new(big.Float).SetPrec(fastTablePrec).Set(v)
	pow := new(big.Float).SetPrec(fastTablePrec).Set(v)
	term := new(big.Float).SetPrec(fastTablePrec)
	odd := new(big.Float).SetPrec(fastTablePrec)
	for m := 1; pow.Sign() != 0 && pow.MantExp(nil) > -fastTablePrec; m++ {
		pow.Mul(pow, v2)
		term.Quo(pow, odd.SetInt64(int64(2*m+1)))
		sum.Add(sum, term)
	}
	return sum.Mul(sum, big.NewFloat(2))
}

// pow2 returns 2^k for -1022 <= k <= 1023.
func pow2(k int64) float64 {
	return math.Float64frombits(uint64(k+1023) << 52)
}

// expReduce performs Tang's reduction of x (|x| < 1400): it returns k,
// the table entry for j, and p = exp(r) - 1.
func expReduce(x float64) (k int64, t *[2]float64, p float64) {
	kd := x*expInvStep + expShift
	n := math.Float64bits(kd) - math.Float64bits(expShift) // k*N + j, two's complement
	kd -= expShift
	// kd*expStepHi is exact and close to x, so the first difference is
	// exact; the second rounds at the 2^-60 level.
	r := (x - kd*expStepHi) - kd*expStepLo
	r2 := r * r
	p = r + r2*((0.5+r*(1.0/6))+r2*(1.0/24+r*(1.0/120)))
	return int64(n) >> expTableBits, &expTab[n&(expN-1)], p
}

// expFast returns e^x with an error below 0.6 ulp (measured against
// math/big in the tests); NaN for NaN, +Inf above expOverflow, and
// correctly scaled subnormals down to underflow to 0.
func expFast(x float64) float64 {
	if !(math.Abs(x) <= expFastMax) {
		return expEdge(x)
	}
	k, t, p := expReduce(x)
	return (t[0] + (t[1] + t[0]*p)) * pow2(k)
}

// expEdge is expFast outside [-708, 708]. (math.Exp is no fallback
// here: on amd64 it returns +Inf from about x = 709.44 on.)
func expEdge(x float64) float64 {
	switch {
	case x > expOverflow:
		return math.Inf(1)
	case x < expUnderflow:
		return 0
	case x != x: // NaN
		return x
	}
	k, t, p := expReduce(x)
	y := t[0] + (t[1] + t[0]*p)
	if k > 0 {
		// 2^1024 is not a float64: scale in two steps.
		return y * pow2(k-1) * 2
	}
	// Subnormal result: y*2^(k+64) is exact, and the last product
	// rounds once to the subnormal grid.
	return y * pow2(k+64) * 0x1p-64
}

// expm1Fast returns e^x - 1, accurate relative to the result also for
// small |x| (below 0.8 ulp, measured against math/big in the tests).
// Arguments above expm1Max and NaN go to math.Expm1.
func expm1Fast(x float64) float64 {
	if math.Abs(x) <= expm1PolyMax {
		// Taylor series to x^8/8!; truncation below x^8/9! < 3e-18
		// relative for |x| <= 1/32.
		x2 := x * x
		x4 := x2 * x2
		q := (0.5 + x*(1.0/6)) + x2*(1.0/24+x*(1.0/120)) + x4*((1.0/720+x*(1.0/5040))+x2*(1.0/40320))
		return x + x2*q
	}
	if !(x >= expm1NegOne && x <= expm1Max) {
		if x < expm1NegOne {
			return -1
		}
		return math.Expm1(x)
	}
	k, t, p := expReduce(x)
	hi := t[0]
	tail := t[1] + hi*p
	if k >= -1 {
		// -1 <= k <= 51 (x <= 36): hi - 2^-k is exact (a multiple of
		// 2^-52 below 2 in magnitude), so only the final sum rounds.
		return ((hi - pow2(-k)) + tail) * pow2(k)
	}
	// k < -1: 2^k*(hi + tail) < 1/2 carries its rounding at a quarter
	// ulp of the result or less.
	return (hi+tail)*pow2(k) - 1
}

// logFast returns the natural logarithm of x with an error below 0.6 ulp
// (measured against math/big in the tests): -Inf for ±0, NaN for x < 0
// and NaN, +Inf for +Inf; subnormal x are handled like normal x (unlike
// math.Log on amd64, which is wrong for them).
func logFast(x float64) float64 { return logPlus(x, 0) }

// logPlus returns log(x) + d with d added among the small terms, before
// the final rounding: for |d| up to a few ulps of log x the result
// carries one rounding, not two.
func logPlus(x, d float64) float64 {
	ix := math.Float64bits(x)
	if ix-0x0010000000000000 >= 0x7FE0000000000000 {
		// Not a positive normal finite number.
		switch {
		case x > 0 && x < 0x1p-1022:
			// Scale the subnormal up and take 52 off the (now virtual,
			// possibly wrapped) exponent field: the arithmetic below is
			// modulo 2^64 and recovers k exactly.
			ix = math.Float64bits(x*0x1p52) - 52<<52
		case x == 0:
			return math.Inf(-1)
		case x > 0: // +Inf
			return x
		default: // x < 0 or NaN
			return math.NaN()
		}
	}
	tmp := ix - logOff
	e := &logTab[(tmp>>(52-logTableBits))&(logN-1)]
	k := float64(int64(tmp) >> 52)
	iy := ix - tmp&(0xFFF<<52) // y = x / 2^k in [0.709, 1.418)
	y := math.Float64frombits(iy)
	yh := math.Float64frombits(iy &^ (1<<logTailBits - 1))
	c := e[0]
	// r = c*y - 1 exactly: c*yh has at most 53 bits and is within 2^-7
	// of 1, so c*yh - 1 is exact; c*(y - yh) is exact; and c*y - 1 is a
	// multiple of 2^-60 below 2^-7 in magnitude, so the sum is exact.
	r := (c*yh - 1) + c*(y-yh)
	// (k*ln2Hi - head) is exact on the 2^-42 grid; add r with an exact
	// two-sum so that only the final addition rounds.
	a := k*ln2Hi - e[1]
	s := a + r
	rb := s - a
	err := (a - (s - rb)) + (r - rb)
	r2 := r * r
	r4 := r2 * r2
	// log1p(r) - r = r^2 * (-1/2 + r/3 - r^2/4 + r^3/5 - r^4/6 + r^5/7 - r^6/8)
	q := r2 * ((-0.5 + r*(1.0/3)) + r2*(-0.25+r*0.2) + r4*((-1.0/6+r*(1.0/7))+r2*(-0.125)))
	return s + ((k*ln2Lo - e[2]) + err + q + d)
}

// log1pFast returns log(1 + x) with an error below 0.8 ulp (measured
// against math/big in the tests; the excess over logFast comes from
// rounding c/u where it is comparable to the result, |x| near 2^-52). The rounding error c of u = 1 + x is
// recovered exactly and added back to first order, log(u) + c/u, whose
// neglected term (c/u)^2/2 is below 2^-106. Arguments outside
// (-1, 2^52) and NaN go to math.Log1p.
func log1pFast(x float64) float64 {
	if !(x > -1 && x < 0x1p52) {
		return math.Log1p(x)
	}
	u := 1 + x
	if u == 1 {
		// |x| < 2^-53 (or ±0): log1p(x) = x - x^2/2 rounds to x.
		return x
	}
	// u - 1 is exact for u in (0, 2^52]; c is the exact rounding error.
	c := x - (u - 1)
	return logPlus(u, c/u)
}
