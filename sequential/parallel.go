package sequential

import (
	"runtime"
	"sync"
	"sync/atomic"
)

// parallelFor calls f(i) for every i in [0, n) on up to workers
// goroutines (0 means GOMAXPROCS) and waits. Indices are handed out one
// at a time, so a goroutine that drew cheap ones takes more of them. f
// must touch only what belongs to index i; results then do not depend on
// the number of workers or on scheduling. This is the package's one
// scheme for spreading work over cores.
func parallelFor(workers, n int, f func(i int)) {
	if workers <= 0 {
		workers = runtime.GOMAXPROCS(0)
	}
	workers = min(workers, n)
	if workers <= 1 {
		for i := 0; i < n; i++ {
			f(i)
		}
		return
	}
	var wg sync.WaitGroup
	var next atomic.Int64
	for range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for {
				i := int(next.Add(1) - 1)
				if i >= n {
					return
				}
				f(i)
			}
		}()
	}
	wg.Wait()
}
