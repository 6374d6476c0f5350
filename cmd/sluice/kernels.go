package main

import "sluice/server/session"

// kernelNames returns the names of the kernels a session may ask for, in
// the engine's registry order: the one place this command reads them from.
func kernelNames() []string { return session.KernelNames() }
