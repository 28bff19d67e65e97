package main

import (
	"crypto/rand"
	"crypto/sha256"
	_ "embed"
	"encoding/hex"
	"errors"
	"fmt"

	"github.com/spf13/cobra"

	"github.com/stintlab/stint/budget"
)

//go:embed example.yaml
var exampleConfig string

func newConfigCmd() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "config",
		Short: "Work with stint configuration files",
		Long: `Work with stint serve's YAML config. "stint config example" prints a
complete, commented one to start from; "stint serve --config FILE
--check-config" validates a file as serving would.`,
		Example: `  stint config example > stint.yaml
  stint serve --config stint.yaml --check-config`,
	}
	cmd.AddCommand(&cobra.Command{
		Use:   "example",
		Short: "Print a complete, commented example config",
		Long: `Print a config with every setting, each commented: upstreams and their
breakers, retries and fallbacks, teams and their keys and budgets, cache,
runs, server limits, metrics, log, prices, budget, store (Redis), admin keys
and the operator page. Every key is optional unless marked required.`,
		Example: `  stint config example > stint.yaml`,
		Args:    cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			_, err := fmt.Fprint(cmd.OutOrStdout(), exampleConfig)
			return err
		},
	})
	return cmd
}

func newKeysCmd() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "keys",
		Short: "Make client keys for teams",
		Long: `Make keys: a team's client key, or an admin key for the admin endpoints
(stint statement, stint budget, the operator page). Only a key's SHA-256
goes into the config.`,
		Example: `  stint keys new --team lab
  stint keys new --admin`,
	}
	var team string
	var admin bool
	newCmd := &cobra.Command{
		Use:   "new",
		Short: "Print a fresh random key and the config lines that admit it",
		Long: `Print a fresh random key, for a team (--team NAME) or for the admin
endpoints (--admin), and the config lines that admit it, in the example
config's style, to paste as they are: a whole team entry for teams:, or the
admin section; to add the key to a team or admin section you already have,
add its "sha256:..." string to that section's keys list. Only the key's
SHA-256 goes into the config; hand the key itself to the team and keep it
out of files.

A team name is 1 to 128 letters, digits, '.', '_' or '-' (it appears in
metrics, Redis keys and URLs).`,
		Example: `  stint keys new --team lab
  stint keys new --admin`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if (team == "") == !admin {
				return errors.New("give --team NAME for a client key, or --admin for an admin key")
			}
			if !admin {
				if err := checkTeamName(team); err != nil {
					return fmt.Errorf("--team %q: %w", team, err)
				}
			}
			key, hash, err := newClientKey()
			if err != nil {
				return err
			}
			out := cmd.OutOrStdout()
			if admin {
				fmt.Fprintf(out, "admin key (give it as --key, or set STINT_ADMIN_KEY, where you run stint statement or stint budget; it is not stored anywhere):\n  %s\n", key)
				fmt.Fprintf(out, "\nthe config's admin section with it (or add %q to the keys you have):\n\nadmin:\n  keys: [%q]\n", hash, hash)
				return nil
			}
			fmt.Fprintf(out, "key for team %s (give it to the team; it is not stored anywhere):\n  %s\n", team, key)
			fmt.Fprintf(out, "\nthe team's entry, under teams: in the config (or add %q to the keys of team %s):\n\n  - name: %s\n    keys: [%q]\n", hash, team, team, hash)
			return nil
		},
	}
	newCmd.Flags().StringVar(&team, "team", "", "team the key is for")
	newCmd.Flags().BoolVar(&admin, "admin", false, "make a key for the admin endpoints instead")
	describeFlag(newCmd.Flags(), "team", "NAME", "")
	cmd.AddCommand(newCmd)
	return cmd
}

// teamNameRule says what a team may be called (budget.ValidateName: it
// appears in metrics labels, Redis keys and URLs).
const teamNameRule = "team names are 1 to 128 letters, digits, '.', '_' or '-'"

// checkTeamName refuses a team name the config would refuse.
func checkTeamName(name string) error {
	if budget.ValidateName(name) != nil {
		return errors.New(teamNameRule)
	}
	return nil
}

// newClientKey returns a random key and its stored form sha256:<hex>.
func newClientKey() (key, stored string, err error) {
	var b [24]byte
	if _, err := rand.Read(b[:]); err != nil {
		return "", "", fmt.Errorf("read random bytes: %w", err)
	}
	key = "stint-" + hex.EncodeToString(b[:])
	sum := sha256.Sum256([]byte(key))
	return key, "sha256:" + hex.EncodeToString(sum[:]), nil
}
