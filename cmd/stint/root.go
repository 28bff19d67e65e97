package main

import (
	"github.com/spf13/cobra"
)

// newRootCmd builds the command tree. Each subcommand lives in its own file
// and is added here.
func newRootCmd() *cobra.Command {
	root := &cobra.Command{
		Use:           "stint",
		Short:         "Caching, budgeting proxy for prompt-tuning jobs on paid language-model APIs",
		SilenceUsage:  true,
		SilenceErrors: true,
	}
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
	)
	return root
}
