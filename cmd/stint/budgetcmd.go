package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/proxy"
)

// budgetsAnswer is the body the budgets endpoint returns.
type budgetsAnswer struct {
	Budgets []budget.Standing `json:"budgets"`
}

func newBudgetCmd() *cobra.Command {
	remote := proxyFlags{admin: true}
	var asJSON bool
	cmd := &cobra.Command{
		Use:   "budget",
		Short: "Show or change team budgets on a running proxy",
		Long: `Show each team's budget standing, or set a team's budget while the proxy
runs, through its admin endpoints (GET /stint/admin/budgets, PUT and DELETE
/stint/admin/budgets/TEAM). The admin key is --key, else $STINT_ADMIN_KEY
(make one with "stint keys new --admin"); a proxy run without a config
needs none.

A budget set here replaces the configured one on every replica sharing the
store, until it is cleared; it survives restarts. Amounts are estimates
from configured prices; the provider's bill is the record.`,
		Example: `  STINT_ADMIN_KEY=... stint budget show
  stint budget set --team lab --usd 40 --per month --proxy http://10.0.0.5:8787
  stint budget clear --team lab --json`,
	}
	pf := cmd.PersistentFlags()
	remote.register(pf)
	pf.BoolVar(&asJSON, "json", false, "print JSON instead of a table")

	show := &cobra.Command{
		Use:   "show",
		Short: "Print every capped team's budget, spend, holds and what is left",
		Long: `Print, for every team with a budget, its period, the budget, what was
spent and is held by calls in flight this period, and what is left.`,
		Example: `  stint budget show
  stint budget show --json`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			c, err := remote.client()
			if err != nil {
				return err
			}
			var a budgetsAnswer
			if err := c.json(cmd.Context(), http.MethodGet, proxy.AdminPrefix+"budgets", nil, nil, &a); err != nil {
				return err
			}
			return writeStandings(cmd.OutOrStdout(), a, asJSON)
		},
	}
	var team, per string
	var usdAmount float64
	set := &cobra.Command{
		Use:   "set --team NAME --usd USD",
		Short: "Set a team's budget",
		Long: `Set a team's budget per period while the proxy runs. It counts what the
team already spent in the period, and holds on every replica sharing the
store until "stint budget clear" takes it back to the config's.`,
		Example: `  stint budget set --team lab --usd 40 --per month
  stint budget set --team lab --usd 2.50 --per day`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if team == "" || !cmd.Flags().Changed("usd") {
				return errors.New("--team and --usd are required")
			}
			return changeBudget(cmd.Context(), cmd.OutOrStdout(), remote, http.MethodPut, team, &proxy.BudgetChange{USD: &usdAmount, Per: budget.Period(per)}, asJSON)
		},
	}
	set.Flags().StringVar(&team, "team", "", "the team (required)")
	set.Flags().Float64Var(&usdAmount, "usd", 0, "budget per period in USD (required)")
	set.Flags().StringVar(&per, "per", "month", "period: day, week, month or total")
	describeFlag(set.Flags(), "team", "NAME", "")
	describeFlag(set.Flags(), "usd", "USD", "")
	describeFlag(set.Flags(), "per", "PERIOD", "")
	clear := &cobra.Command{
		Use:     "clear --team NAME",
		Short:   "Go back to the team's configured budget",
		Long:    `Remove a budget set with "stint budget set": the team's budget is the config's again.`,
		Example: `  stint budget clear --team lab`,
		Args:    cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if team == "" {
				return errors.New("--team is required")
			}
			return changeBudget(cmd.Context(), cmd.OutOrStdout(), remote, http.MethodDelete, team, nil, asJSON)
		},
	}
	clear.Flags().StringVar(&team, "team", "", "the team (required)")
	describeFlag(clear.Flags(), "team", "NAME", "")
	cmd.AddCommand(show, set, clear)
	return cmd
}

func changeBudget(ctx context.Context, out io.Writer, remote proxyFlags, method, team string, ch *proxy.BudgetChange, asJSON bool) error {
	c, err := remote.client()
	if err != nil {
		return err
	}
	var a budgetsAnswer
	var body any
	if ch != nil {
		body = ch
	}
	if err := c.json(ctx, method, proxy.AdminPrefix+"budgets/"+url.PathEscape(team), nil, body, &a); err != nil {
		var pe *proxyError
		if errors.As(err, &pe) && pe.Code == "invalid_value" {
			return fmt.Errorf("--usd or --per: %s", pe.Message)
		}
		return err
	}
	return writeStandings(out, a, asJSON)
}

// writeStandings prints the budgets as a table, or as JSON.
func writeStandings(out io.Writer, a budgetsAnswer, asJSON bool) error {
	if asJSON {
		if a.Budgets == nil {
			a.Budgets = []budget.Standing{}
		}
		return printJSON(out, a)
	}
	return printStandings(out, a.Budgets)
}

func printStandings(out io.Writer, ss []budget.Standing) error {
	if len(ss) == 0 {
		fmt.Fprintln(out, "no team has a budget")
		return nil
	}
	w := tabwriter.NewWriter(out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(w, "TEAM\tPERIOD\tBUDGET USD\tSPENT USD\tHELD USD\tLEFT USD\tHOLDS\tHELD UNTIL\t")
	holds := false
	for _, b := range ss {
		until := "-"
		if b.HeldUntil != nil {
			until = b.HeldUntil.UTC().Format(time.RFC3339)
		}
		holds = holds || b.Holds > 0
		fmt.Fprintf(w, "%s\t%s\t%s\t%s\t%s\t%s\t%d\t%s\t\n", b.Team, b.Period, b.LimitUSD, b.SpentUSD, b.HeldUSD, b.LeftUSD, b.Holds, until)
	}
	if err := w.Flush(); err != nil {
		return err
	}
	if holds {
		_, err := fmt.Fprintln(out, "HELD is reserved for calls not settled yet: each is settled by its call (retried while the store\n"+
			"is unreachable), or, if its proxy died, charged in full at its lease's end, by HELD UNTIL at the latest.")
		return err
	}
	return nil
}
