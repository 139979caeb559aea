package sequential_test

import (
	"fmt"
	"math"

	"rivalmix/sequential"
)

// A segment whose latent relative cross-elasticities follow
// ExpWeibull{A: 2.5, K: 2.2, S: 0.3}: the typical competitor, and the
// strongest of 10 candidates through the closure under maxima.
func ExampleExpWeibull() {
	seg := sequential.ExpWeibull{A: 2.5, K: 2.2, S: 0.3}
	fmt.Printf("median competitor: %.3f\n", seg.Quantile(0.5))
	fmt.Printf("90%% of competitors below: %.3f\n", seg.Quantile(0.9))
	fmt.Printf("P(competitor above 0.6): %.4f\n", seg.Survival(0.6))

	strongest := sequential.ExpWeibull{A: 10 * seg.A, K: seg.K, S: seg.S}
	fmt.Printf("median strongest of 10: %.3f\n", strongest.Quantile(0.5))
	// Output:
	// median competitor: 0.352
	// 90% of competitors below: 0.508
	// P(competitor above 0.6): 0.0251
	// median strongest of 10: 0.537
}

// A product whose refit reported three of ten candidate competitors: what
// can be said about the strongest competitor it did not report.
func ExampleNextValue() {
	seg := sequential.Theta{LogA: math.Log(2.5), LogK: math.Log(2.2), LogS: math.Log(0.3)}
	d, err := sequential.NewDatum([]float64{0.82, 0.61, 0.44}, 10)
	if err != nil {
		fmt.Println(err)
		return
	}
	next, ok := sequential.NewNextValue(seg, &d)
	if !ok {
		fmt.Println("every candidate was reported")
		return
	}
	fmt.Printf("median: %.3f\n", next.Quantile(0.5))
	fmt.Printf("90%% interval: [%.3f, %.3f]\n", next.Quantile(0.05), next.Quantile(0.95))
	fmt.Printf("P(above 0.4): %.3f\n", next.Exceed(0.4))
	// Output:
	// median: 0.413
	// 90% interval: [0.353, 0.438]
	// P(above 0.4): 0.661
}
