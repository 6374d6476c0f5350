package benchkit

import (
	"context"
	"fmt"
	"runtime"
	"runtime/metrics"
	"sync"
	"time"

	"sluice/client"
	"sluice/kernels/targets"
)

// HeapSample is the live heap, over the baseline, once a number of draws
// had arrived.
type HeapSample struct {
	Draws       int64 `json:"draws"`
	GrowthBytes int64 `json:"live_heap_growth_bytes"`
}

// MemoryResult is the heap of one long session.
type MemoryResult struct {
	Shape
	Draws int64 `json:"draws"`
	// BaselineBytes is the live heap of the process before the session,
	// with the server and its connection open.
	BaselineBytes uint64 `json:"baseline_heap_bytes"`
	// Samples are taken every tenth of the draws, after a collection.
	Samples []HeapSample `json:"samples"`
	// AtTenth and AtEnd are the live heap growth at a tenth of the draws
	// and at the end (the first and last samples).
	AtTenth int64 `json:"growth_at_tenth_bytes"`
	AtEnd   int64 `json:"growth_at_end_bytes"`
	// PeakLive is the largest sampled live growth; PeakWithGarbage is the
	// largest growth of the heap's objects, dead ones not yet collected
	// included, read from runtime/metrics every 10 ms.
	PeakLive        int64 `json:"peak_live_growth_bytes"`
	PeakWithGarbage int64 `json:"peak_heap_growth_bytes"`
	// Ratio is AtEnd/AtTenth; Flat says whether AtEnd exceeds AtTenth by
	// at most a tenth of it plus 1 MiB.
	Ratio   float64 `json:"ratio"`
	Flat    bool    `json:"flat"`
	Seconds float64 `json:"seconds"`
}

// heapObjects is the runtime/metrics name of the bytes in heap objects,
// live or not yet collected.
const heapObjects = "/memory/classes/heap/objects:bytes"

// Memory runs one lmc session of draws kept draws (every step kept) on a
// fresh server from ServeSluice, in this process, and samples the heap
// while it runs: the live heap after a collection at every tenth of the
// draws, and the heap's objects every 10 ms. draws must be a multiple of
// 10·chains.
func Memory(ctx context.Context, s Shape, draws int64) (MemoryResult, error) {
	res := MemoryResult{Shape: s, Draws: draws}
	every := draws / 10
	if draws <= 0 || every%int64(s.Chains) != 0 {
		panic(fmt.Sprintf("benchkit: Memory(%v, %d): draws must be a positive multiple of 10·chains", s, draws))
	}
	srv, err := ServeSluice()
	if err != nil {
		return res, err
	}
	defer srv.Close()
	tg := NewDiagGaussian(s.Dim)
	if _, err := RunSession(ctx, srv.Conn(), s, tg, min(WarmSteps, int(every)/s.Chains), 0); err != nil {
		return res, err
	}

	var ms runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&ms)
	res.BaselineBytes = ms.HeapAlloc
	sample := []metrics.Sample{{Name: heapObjects}}
	metrics.Read(sample)
	objects0 := sample[0].Value.Uint64()

	stop := make(chan struct{})
	var wg sync.WaitGroup
	var peak uint64
	wg.Go(func() {
		tick := time.NewTicker(10 * time.Millisecond)
		defer tick.Stop()
		s := []metrics.Sample{{Name: heapObjects}}
		for {
			select {
			case <-stop:
				return
			case <-tick.C:
				metrics.Read(s)
				peak = max(peak, s[0].Value.Uint64())
			}
		}
	})

	spec := client.Spec{Dim: s.Dim, Chains: s.Chains, Kernel: "lmc", Start: make([]float64, s.Dim), Step: Step,
		KeepEvery: 1, DrawsPerChain: draws / int64(s.Chains), Seed: Seed, MaxMessageBytes: MessageBytes}
	eval := func(_ context.Context, bt *client.Batch) error {
		targets.EvalBatch(tg, bt.Points, bt.Rows, bt.Grad, nil)
		return nil
	}
	var got int64
	next := every
	onDraws := client.OnDraws(func(d *client.Draws) {
		got += int64(d.Rows)
		if got >= next {
			runtime.GC()
			runtime.ReadMemStats(&ms)
			res.Samples = append(res.Samples, HeapSample{Draws: got, GrowthBytes: int64(ms.HeapAlloc) - int64(res.BaselineBytes)})
			next += every
		}
	})
	t0 := time.Now()
	sum, err := client.Run(ctx, srv.Conn(), spec, eval, onDraws)
	res.Seconds = time.Since(t0).Seconds()
	close(stop)
	wg.Wait()
	if err != nil {
		return res, err
	}
	if (sum.Reason != client.DrawsCollected && sum.Reason != client.CheckFailed) || sum.DrawsReceived != draws || len(res.Samples) != 10 {
		return res, fmt.Errorf("memory session %v: ended with %q after %d draws and %d heap samples, want %d draws and 10 samples",
			s, sum.Reason, sum.DrawsReceived, len(res.Samples), draws)
	}
	res.AtTenth, res.AtEnd = res.Samples[0].GrowthBytes, res.Samples[9].GrowthBytes
	for _, x := range res.Samples {
		res.PeakLive = max(res.PeakLive, x.GrowthBytes)
	}
	res.PeakWithGarbage = int64(peak) - int64(objects0)
	res.Ratio = float64(res.AtEnd) / float64(res.AtTenth)
	res.Flat = res.AtEnd <= res.AtTenth+res.AtTenth/10+1<<20
	return res, nil
}
