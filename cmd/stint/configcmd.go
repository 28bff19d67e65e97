package main

import (
	"crypto/rand"
	"crypto/sha256"
	_ "embed"
	"encoding/hex"
	"errors"
	"fmt"

	"github.com/spf13/cobra"
)

//go:embed example.yaml
var exampleConfig string

func newConfigCmd() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "config",
		Short: "Work with stint configuration files",
	}
	cmd.AddCommand(&cobra.Command{
		Use:   "example",
		Short: "Print a complete, commented example config",
		Args:  cobra.NoArgs,
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
	}
	var team string
	var admin bool
	newCmd := &cobra.Command{
		Use:   "new",
		Short: "Print a fresh random key and the config line that admits it",
		Long: `Print a fresh random client key for a team, and the line to paste into
the team's keys in the config. Only the key's SHA-256 goes into the config;
hand the key itself to the team and keep it out of files.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if (team == "") == !admin {
				return errors.New("give --team NAME for a client key, or --admin for an admin key")
			}
			key, hash, err := newClientKey()
			if err != nil {
				return err
			}
			out := cmd.OutOrStdout()
			if admin {
				fmt.Fprintf(out, "admin key (set it as STINT_ADMIN_KEY where you run stint statement and stint budget; it is not stored anywhere):\n  %s\n", key)
				fmt.Fprintf(out, "add to admin.keys in the config:\n  - \"%s\"\n", hash)
				return nil
			}
			fmt.Fprintf(out, "key for team %s (give it to the team; it is not stored anywhere):\n  %s\n", team, key)
			fmt.Fprintf(out, "add to teams[name=%s].keys in the config:\n  - \"%s\"\n", team, hash)
			return nil
		},
	}
	newCmd.Flags().StringVar(&team, "team", "", "team the key is for")
	newCmd.Flags().BoolVar(&admin, "admin", false, "make a key for the admin endpoints instead")
	cmd.AddCommand(newCmd)
	return cmd
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
