package kernels

import "math/rand/v2"

// randNormals returns the first n normals of the stream seeded with seed,
// as a kernel built from that seed draws them.
func randNormals(seed uint64, n int) []float64 {
	r := rand.New(NewSource(seed))
	out := make([]float64, n)
	for i := range out {
		out[i] = r.NormFloat64()
	}
	return out
}

// RandNormals exposes randNormals to the external test package.
var RandNormals = randNormals

// The shared test driver and moment helper, for the external test package.
var (
	DriveKernel = driveKernel
	GradEval    = gradEval
	Moment      = moment
)
