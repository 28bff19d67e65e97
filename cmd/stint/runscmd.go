package main

import (
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"

	"github.com/stintlab/stint/proxy"
)

func newRunsCmd() *cobra.Command {
	var remote proxyFlags
	var asJSON bool
	cmd := &cobra.Command{
		Use:   "runs",
		Short: "List, show, export, import and delete recorded runs",
		Long: `Work with the runs a team recorded: calls sent with a Stint-Run header are
journaled, and a later call with the same Stint-Run and
"Stint-Run-Mode: replay" is answered from the journal, byte for byte, with
no upstream call.

These commands talk to a running proxy (--proxy) with a team's client key
(--key, else $STINT_KEY; a proxy run without a config needs none); a team
sees only its own runs. Costs shown are estimates from configured prices;
the provider's bill is the record.`,
		Example: `  STINT_KEY=... stint runs list
  stint runs show orchard-7
  stint runs export orchard-7 -o orchard-7.stintrun
  stint runs import orchard-7.stintrun --as orchard-7-copy
  stint runs delete orchard-7`,
	}
	pf := cmd.PersistentFlags()
	remote.register(pf)
	pf.BoolVar(&asJSON, "json", false, "print JSON instead of a table")

	list := &cobra.Command{
		Use:   "list",
		Short: "List your team's runs, most recent first",
		Long: `List your team's runs, most recent first: calls, upstream calls, the share
answered without the upstream, spend, savings, first and last call; then
what the team's runs hold against its storage quota.`,
		Example: `  stint runs list
  stint runs list --json`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			c, err := remote.client()
			if err != nil {
				return err
			}
			var l proxy.RunList
			if err := c.json(cmd.Context(), http.MethodGet, proxy.RunsPrefix, nil, nil, &l); err != nil {
				return err
			}
			if asJSON {
				if l.Runs == nil {
					l.Runs = []proxy.RunView{}
				}
				return printJSON(cmd.OutOrStdout(), l)
			}
			if err := printRuns(cmd.OutOrStdout(), l.Runs); err != nil {
				return err
			}
			return printStorage(cmd.OutOrStdout(), l)
		},
	}
	show := &cobra.Command{
		Use:   "show ID",
		Short: "Show one run in detail: calls by model and by cache outcome, spend, replays",
		Long: `Show one run: its calls, upstream calls, spend and savings, first and last
call; the same by model and by cache outcome; and the replay sessions the
proxy process has answered from it since it started.`,
		Example: `  stint runs show orchard-7
  stint runs show orchard-7 --json`,
		Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			c, err := remote.client()
			if err != nil {
				return err
			}
			var d proxy.RunDetail
			if err := c.json(cmd.Context(), http.MethodGet, proxy.RunsPrefix+"/"+url.PathEscape(args[0]), nil, nil, &d); err != nil {
				return err
			}
			if asJSON {
				return printJSON(cmd.OutOrStdout(), d)
			}
			return printRunDetail(cmd.OutOrStdout(), d)
		},
	}
	var output string
	export := &cobra.Command{
		Use:   "export ID -o FILE",
		Short: "Write a run to one self-contained archive",
		Long: `Write a run to one file: a zstd-compressed tar with a manifest (format,
version, figures, every member's size and SHA-256), the entries and each
distinct answer once. The file appears only once it is complete.`,
		Example: `  stint runs export orchard-7 -o orchard-7.stintrun`,
		Args:    cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			if output == "" {
				return errors.New("-o FILE is required")
			}
			c, err := remote.client()
			if err != nil {
				return err
			}
			resp, err := c.do(cmd.Context(), http.MethodGet, proxy.RunsPrefix+"/"+url.PathEscape(args[0])+"/archive", nil, nil, "")
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
	describeFlag(export.Flags(), "output", "FILE", "")
	var as string
	var replace bool
	imp := &cobra.Command{
		Use:   "import FILE",
		Short: "Load a run archive into your team's runs",
		Long: `Load an archive written by "stint runs export" into your team's runs. A
corrupt or cut archive is refused whole; nothing is half-imported.`,
		Example: `  stint runs import orchard-7.stintrun
  stint runs import orchard-7.stintrun --as orchard-7-copy
  stint runs import orchard-7.stintrun --replace`,
		Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			f, err := os.Open(args[0])
			if err != nil {
				return err
			}
			defer f.Close()
			c, err := remote.client()
			if err != nil {
				return err
			}
			q := url.Values{}
			if as != "" {
				q.Set("as", as)
			}
			if replace {
				q.Set("replace", "true")
			}
			resp, err := c.do(cmd.Context(), http.MethodPost, proxy.RunsPrefix+"/import", q, f, "application/octet-stream")
			if err != nil {
				return importError(err, as)
			}
			defer resp.Body.Close()
			var v proxy.RunView
			if err := decodeJSON(resp.Body, &v); err != nil {
				return err
			}
			if asJSON {
				return printJSON(cmd.OutOrStdout(), v)
			}
			return printRuns(cmd.OutOrStdout(), []proxy.RunView{v})
		},
	}
	imp.Flags().StringVar(&as, "as", "", "store the run under this id instead of the archive's")
	imp.Flags().BoolVar(&replace, "replace", false, "replace a run your team already has under that id")
	describeFlag(imp.Flags(), "as", "ID", "")
	del := &cobra.Command{
		Use:     "delete ID",
		Short:   "Delete a run and its recorded answers",
		Long:    `Delete a run and its recorded answers, freeing their space in the team's quota.`,
		Example: `  stint runs delete orchard-7`,
		Args:    cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			c, err := remote.client()
			if err != nil {
				return err
			}
			var out map[string]string
			if err := c.json(cmd.Context(), http.MethodDelete, proxy.RunsPrefix+"/"+url.PathEscape(args[0]), nil, nil, &out); err != nil {
				return err
			}
			if asJSON {
				return printJSON(cmd.OutOrStdout(), map[string]string{"deleted": args[0]})
			}
			fmt.Fprintf(cmd.OutOrStdout(), "deleted run %s\n", args[0])
			return nil
		},
	}
	cmd.AddCommand(list, show, export, imp, del)
	return cmd
}

// quotedRun finds `run "ID"` in a proxy's message.
var quotedRun = regexp.MustCompile(`run "[^"]*"`)

// importError says an import's refusal in the command's terms: its flags,
// not the API's query parameters (as=, replace=true).
func importError(err error, as string) error {
	var pe *proxyError
	if !errors.As(err, &pe) {
		return err
	}
	switch {
	case pe.Code == "run_exists":
		id := "under this archive's id"
		if m := quotedRun.FindStringSubmatch(pe.Message); m != nil {
			id = m[0]
		}
		return fmt.Errorf("your team already has %s: import it under another id with --as NEW-ID, or replace it with --replace", id)
	case pe.Code == "invalid_value" && as != "":
		return fmt.Errorf("--as %q is not a run id: 1-128 of A-Z a-z 0-9 . _ -", as)
	}
	return err
}

func printRuns(out io.Writer, vs []proxy.RunView) error {
	if len(vs) == 0 {
		fmt.Fprintln(out, "no runs")
		return nil
	}
	w := tabwriter.NewWriter(out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(w, "RUN\tCALLS\tUPSTREAM\tCALLS FROM CACHE\tSPENT USD\tSAVED USD\tFIRST\tLAST\t")
	for _, v := range vs {
		fmt.Fprintf(w, "%s\t%d\t%d\t%s%%\t%s\t%s\t%s\t%s\t\n", v.Run, v.Calls, v.UpstreamCalls,
			strconv.FormatFloat(100*v.CacheShare, 'f', 1, 64), v.SpentUSD, v.SavedUSD,
			v.First.Format(time.RFC3339), v.Last.Format(time.RFC3339))
	}
	return w.Flush()
}

// printRunDetail prints one run: its summary, its calls by model and by
// cache outcome, and its replay sessions.
func printRunDetail(out io.Writer, d proxy.RunDetail) error {
	v := d.RunView
	fmt.Fprintf(out, "run %s: %d calls, %d upstream, %s%% of calls from the cache, spent %s USD, saved %s USD\n",
		v.Run, v.Calls, v.UpstreamCalls, strconv.FormatFloat(100*v.CacheShare, 'f', 1, 64), v.SpentUSD, v.SavedUSD)
	fmt.Fprintf(out, "first %s, last %s; %d distinct requests, %d distinct answers, %d bytes\n",
		v.First.Format(time.RFC3339), v.Last.Format(time.RFC3339), v.Keys, v.Bodies, v.Bytes)
	for _, g := range []struct {
		title  string
		groups []proxy.RunGroup
	}{{"MODEL", d.ByModel}, {"CACHE", d.ByOutcome}} {
		fmt.Fprintln(out)
		w := tabwriter.NewWriter(out, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintf(w, "%s\tCALLS\tUPSTREAM\tSPENT USD\tSAVED USD\t\n", g.title)
		for _, r := range g.groups {
			fmt.Fprintf(w, "%s\t%d\t%d\t%s\t%s\t\n", r.Name, r.Calls, r.UpstreamCalls, r.SpentUSD, r.SavedUSD)
		}
		if err := w.Flush(); err != nil {
			return err
		}
	}
	fmt.Fprintln(out)
	if len(d.Replays) == 0 {
		_, err := fmt.Fprintln(out, "no replays of it answered by this proxy process")
		return err
	}
	w := tabwriter.NewWriter(out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(w, "REPLAY SESSION\tCALLS\t")
	for _, r := range d.Replays {
		name := r.Session
		if name == "" {
			name = "(none named)"
		}
		fmt.Fprintf(w, "%s\t%d\t\n", name, r.Calls)
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
