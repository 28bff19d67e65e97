package main

import (
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"strconv"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"

	"github.com/stintlab/stint/proxy"
)

func newRunsCmd() *cobra.Command {
	var proxyURL string
	cmd := &cobra.Command{
		Use:   "runs",
		Short: "List, show, export, import and delete recorded runs",
		Long: `Work with the runs a team recorded: calls sent with a Stint-Run header are
journaled, and a later call with the same Stint-Run and
"Stint-Run-Mode: replay" is answered from the journal, byte for byte, with
no upstream call.

These commands talk to a running proxy with a team's client key, read from
STINT_KEY; a team sees only its own runs. Costs shown are estimates from
configured prices; the provider's bill is the record.`,
		Example: `  STINT_KEY=... stint runs list
  stint runs show orchard-7
  stint runs export orchard-7 -o orchard-7.stintrun
  stint runs import orchard-7.stintrun --as orchard-7-copy
  stint runs delete orchard-7`,
	}
	cmd.PersistentFlags().StringVar(&proxyURL, "proxy", "http://127.0.0.1:8787", "address of the running proxy")

	list := &cobra.Command{
		Use: "list", Short: "List your team's runs, most recent first", Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			var l proxy.RunList
			if err := jsonCall(cmd.Context(), teamKeyEnv, http.MethodGet, proxyURL, proxy.RunsPrefix, nil, nil, &l); err != nil {
				return err
			}
			if err := printRuns(cmd.OutOrStdout(), l.Runs); err != nil {
				return err
			}
			return printStorage(cmd.OutOrStdout(), l)
		},
	}
	show := &cobra.Command{
		Use: "show ID", Short: "Show one run: calls, upstream calls, cache share, spend, saved, times", Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			var v proxy.RunView
			if err := jsonCall(cmd.Context(), teamKeyEnv, http.MethodGet, proxyURL, proxy.RunsPrefix+"/"+url.PathEscape(args[0]), nil, nil, &v); err != nil {
				return err
			}
			return printRuns(cmd.OutOrStdout(), []proxy.RunView{v})
		},
	}
	var output string
	export := &cobra.Command{
		Use: "export ID -o FILE", Short: "Write a run to one self-contained archive", Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			if output == "" {
				return errors.New("-o FILE is required")
			}
			resp, err := proxyRequest(cmd.Context(), teamKeyEnv, http.MethodGet, proxyURL, proxy.RunsPrefix+"/"+url.PathEscape(args[0])+"/archive", nil, nil, "")
			if err != nil {
				return err
			}
			defer resp.Body.Close()
			// Write beside the target and rename, so a cut download never
			// leaves a file that looks finished.
			tmp, err := os.CreateTemp(filepath.Dir(output), ".stintrun-*")
			if err != nil {
				return err
			}
			defer os.Remove(tmp.Name())
			n, err := io.Copy(tmp, resp.Body)
			if cerr := tmp.Close(); err == nil {
				err = cerr
			}
			if err != nil {
				return fmt.Errorf("download the archive: %w", err)
			}
			if err := os.Rename(tmp.Name(), output); err != nil {
				return err
			}
			fmt.Fprintf(cmd.OutOrStdout(), "wrote %s (%d bytes)\n", output, n)
			return nil
		},
	}
	export.Flags().StringVarP(&output, "output", "o", "", "archive file to write (required)")
	var as string
	var replace bool
	imp := &cobra.Command{
		Use: "import FILE", Short: "Load a run archive into your team's runs", Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			f, err := os.Open(args[0])
			if err != nil {
				return err
			}
			defer f.Close()
			q := url.Values{}
			if as != "" {
				q.Set("as", as)
			}
			if replace {
				q.Set("replace", "true")
			}
			resp, err := proxyRequest(cmd.Context(), teamKeyEnv, http.MethodPost, proxyURL, proxy.RunsPrefix+"/import", q, f, "application/octet-stream")
			if err != nil {
				return err
			}
			defer resp.Body.Close()
			var v proxy.RunView
			if err := decodeJSON(resp.Body, &v); err != nil {
				return err
			}
			return printRuns(cmd.OutOrStdout(), []proxy.RunView{v})
		},
	}
	imp.Flags().StringVar(&as, "as", "", "store the run under this id instead of the archive's")
	imp.Flags().BoolVar(&replace, "replace", false, "replace a run your team already has under that id")
	del := &cobra.Command{
		Use: "delete ID", Short: "Delete a run and its recorded answers", Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			var out map[string]string
			if err := jsonCall(cmd.Context(), teamKeyEnv, http.MethodDelete, proxyURL, proxy.RunsPrefix+"/"+url.PathEscape(args[0]), nil, nil, &out); err != nil {
				return err
			}
			fmt.Fprintf(cmd.OutOrStdout(), "deleted run %s\n", args[0])
			return nil
		},
	}
	cmd.AddCommand(list, show, export, imp, del)
	return cmd
}

func printRuns(out io.Writer, vs []proxy.RunView) error {
	if len(vs) == 0 {
		fmt.Fprintln(out, "no runs")
		return nil
	}
	w := tabwriter.NewWriter(out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(w, "RUN\tCALLS\tUPSTREAM\tCACHED\tSPENT USD\tSAVED USD\tFIRST\tLAST\t")
	for _, v := range vs {
		fmt.Fprintf(w, "%s\t%d\t%d\t%s%%\t%s\t%s\t%s\t%s\t\n", v.Run, v.Calls, v.UpstreamCalls,
			strconv.FormatFloat(100*v.CacheShare, 'f', 1, 64), v.SpentUSD, v.SavedUSD,
			v.First.Format(time.RFC3339), v.Last.Format(time.RFC3339))
	}
	return w.Flush()
}

// printStorage says what the team's runs hold against its quota.
func printStorage(out io.Writer, l proxy.RunList) error {
	mib := func(n int64) string { return strconv.FormatFloat(float64(n)/(1<<20), 'f', 1, 64) + " MiB" }
	if l.QuotaBytes <= 0 {
		_, err := fmt.Fprintf(out, "stored: %s (no quota)\n", mib(l.StoredBytes))
		return err
	}
	_, err := fmt.Fprintf(out, "stored: %s of the team's %s quota (%s%%)\n", mib(l.StoredBytes), mib(l.QuotaBytes),
		strconv.FormatFloat(100*float64(l.StoredBytes)/float64(l.QuotaBytes), 'f', 1, 64))
	return err
}
