// Package deploy holds stint's deployment files: the container image
// (Dockerfile, with the health-check command in probe/), compose.yaml and
// its nginx.conf, Kubernetes manifests under k8s/, a systemd unit under
// systemd/, and the stint configs they mount under config/.
//
// It has no code of its own. Its tests validate the files where no
// container engine or cluster runs: manifests decode strictly into the
// Kubernetes API types, compose.yaml decodes strictly into the subset it
// uses, ports, paths and image references agree across all files, and every
// mounted config passes `stint serve --check-config` on a freshly built
// static binary.
package deploy
