// Package deploy holds the deployment files of sluice: Kubernetes
// manifests for the server (Deployment, Service, state volume claim) and a
// worker Job template, under deploy/kubernetes. It has no code; its tests
// decode every manifest strictly into the Kubernetes API types, so that a
// misspelt or misplaced field fails the suite, and check the invariants
// the manifests rely on (probe ports, selectors, mounts, image tags).
package deploy
