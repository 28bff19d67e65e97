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
	var proxyURL string
	cmd := &cobra.Command{
		Use:   "budget",
		Short: "Show or change team budgets on a running proxy",
		Long: `Show each team's budget standing, or set a team's budget while the proxy
runs, through its admin endpoints. The admin key is read from
STINT_ADMIN_KEY (make one with "stint keys new --admin").

A budget set here replaces the configured one on every replica sharing the
store, until it is cleared; it survives restarts. Amounts are estimates
from configured prices; the provider's bill is the record.`,
		Example: `  STINT_ADMIN_KEY=... stint budget show --proxy http://127.0.0.1:8787
  stint budget set --proxy http://127.0.0.1:8787 --team lab --usd 40 --per month
  stint budget clear --proxy http://127.0.0.1:8787 --team lab`,
	}
	cmd.PersistentFlags().StringVar(&proxyURL, "proxy", "http://127.0.0.1:8787", "address of the running proxy")

	show := &cobra.Command{
		Use:   "show",
		Short: "Print every capped team's budget, spend, holds and what is left",
		Args:  cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			var a budgetsAnswer
			if err := adminCall(cmd.Context(), http.MethodGet, proxyURL, proxy.AdminPrefix+"budgets", nil, nil, &a); err != nil {
				return err
			}
			return printStandings(cmd.OutOrStdout(), a.Budgets)
		},
	}
	var team, per string
	var usdAmount float64
	set := &cobra.Command{
		Use:   "set",
		Short: "Set a team's budget",
		Args:  cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if team == "" || !cmd.Flags().Changed("usd") {
				return errors.New("--team and --usd are required")
			}
			return changeBudget(cmd.Context(), cmd.OutOrStdout(), http.MethodPut, proxyURL, team, &proxy.BudgetChange{USD: &usdAmount, Per: budget.Period(per)})
		},
	}
	set.Flags().StringVar(&team, "team", "", "the team (required)")
	set.Flags().Float64Var(&usdAmount, "usd", 0, "budget per period in USD (required)")
	set.Flags().StringVar(&per, "per", "month", "period: day, week, month or total")
	clear := &cobra.Command{
		Use:   "clear",
		Short: "Go back to the team's configured budget",
		Args:  cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if team == "" {
				return errors.New("--team is required")
			}
			return changeBudget(cmd.Context(), cmd.OutOrStdout(), http.MethodDelete, proxyURL, team, nil)
		},
	}
	clear.Flags().StringVar(&team, "team", "", "the team (required)")
	cmd.AddCommand(show, set, clear)
	return cmd
}

func changeBudget(ctx context.Context, out io.Writer, method, base, team string, ch *proxy.BudgetChange) error {
	var a budgetsAnswer
	var body any
	if ch != nil {
		body = ch
	}
	if err := adminCall(ctx, method, base, proxy.AdminPrefix+"budgets/"+url.PathEscape(team), nil, body, &a); err != nil {
		return err
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
