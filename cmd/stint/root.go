package main

import (
	"github.com/spf13/cobra"
)

// newRootCmd builds the command tree. Each subcommand lives in its own file
// and is added here.
func newRootCmd() *cobra.Command {
	root := &cobra.Command{
		Use:   "stint",
		Short: "Caching, budgeting proxy for prompt-tuning jobs on paid language-model APIs",
		Long: `stint sits between prompt-tuning jobs and a paid language-model API: a caching
proxy on the completions wire format (stint serve) that answers repeated
deterministic calls from its cache, merges identical concurrent calls,
reserves every team's spend before a call goes out and records runs for
replay; an RL prompt search that works through it (stint search); and a
small local model on the same wire format (stint local), so all of it runs
offline (stint demo).

Every command that talks to a running proxy takes --proxy (its base URL,
with or without /v1; http://127.0.0.1:8787 unless given) and --key (else
$STINT_KEY; a proxy run without a config needs none).`,
		Example: `  stint demo
  stint serve --upstream local:../shared/models/stories260K.gguf
  stint runs list --json`,
		Version:       currentBuild().Version,
		SilenceUsage:  true,
		SilenceErrors: true,
	}
	root.Flags().Bool("version", false, "print the version, VCS revision and Go release, as stint version does")
	root.SetVersionTemplate(currentBuild().String())
	root.SetUsageFunc(usage)
	root.AddCommand(
		newServeCmd(),
		newLocalCmd(),
		newConfigCmd(),
		newKeysCmd(),
		newStatementCmd(),
		newBudgetCmd(),
		newRunsCmd(),
		newSearchCmd(),
		newDemoCmd(),
		newVersionCmd(),
	)
	return root
}
