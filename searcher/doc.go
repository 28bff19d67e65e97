// Package searcher will hold the prompt-search sidecar: tasks and datasets,
// rewards, the soft Q-learning policy and trainer, baselines and reports. It
// talks to the proxy only over HTTP, like any user's job. Nothing is built
// here yet.
package searcher
