package main

import (
	"slices"

	"sluice/server/session"
)

// kernelNames returns the names of the kernels a session may ask for, in
// the engine's order: the one place this command reads them from.
func kernelNames() []string { return slices.Clone(session.Kernels) }
