package main

import (
	"fmt"
	"io"
	"sort"
	"strings"

	"github.com/spf13/cobra"
	"github.com/spf13/pflag"
)

// Flag annotations the help is rendered from (see flagUsages).
const (
	// annotPlaceholder is the word shown after the flag: URL, DIR, FILE.
	annotPlaceholder = "stint-placeholder"
	// annotDefault describes a default that is not a plain value (it comes
	// from the environment, the config or another flag).
	annotDefault = "stint-default"
)

// describeFlag gives flag name of fl its placeholder in help and, when
// defaultText is set, the description of its default.
func describeFlag(fl *pflag.FlagSet, name, placeholder, defaultText string) {
	if placeholder != "" {
		_ = fl.SetAnnotation(name, annotPlaceholder, []string{placeholder})
	}
	if defaultText != "" {
		_ = fl.SetAnnotation(name, annotDefault, []string{defaultText})
	}
}

// flagPlaceholder is the word help shows after a flag that takes a value.
func flagPlaceholder(f *pflag.Flag) string {
	if v := f.Annotations[annotPlaceholder]; len(v) > 0 {
		return v[0]
	}
	switch f.Value.Type() {
	case "bool":
		return ""
	case "int", "int64":
		return "N"
	case "float64", "usd":
		return "USD"
	case "duration":
		return "DURATION"
	}
	return "VALUE"
}

// flagDefault is the default help shows for a flag, "" for none: its
// described default, else its value unless that is zero or false.
func flagDefault(f *pflag.Flag) string {
	if v := f.Annotations[annotDefault]; len(v) > 0 {
		return v[0]
	}
	switch f.DefValue {
	case "", "0", "false", "[]", "<nil>":
		return ""
	}
	return f.DefValue
}

// flagUsages renders a flag set for help, one way for every command:
// "--name PLACEHOLDER   usage (default: X)".
func flagUsages(fs *pflag.FlagSet) string {
	type line struct{ left, right string }
	var lines []line
	width := 0
	fs.VisitAll(func(f *pflag.Flag) {
		if f.Hidden {
			return
		}
		left := "      --" + f.Name
		if f.Shorthand != "" {
			left = "  -" + f.Shorthand + ", --" + f.Name
		}
		if p := flagPlaceholder(f); p != "" {
			left += " " + p
		}
		right := f.Usage
		if d := flagDefault(f); d != "" {
			right += " (default: " + d + ")"
		}
		lines = append(lines, line{left, right})
		width = max(width, len(left))
	})
	var b strings.Builder
	for _, l := range lines {
		fmt.Fprintf(&b, "%-*s   %s\n", width, l.left, l.right)
	}
	return b.String()
}

// usage writes a command's usage, cobra's layout with flagUsages for the
// flags; it is every command's usage function.
func usage(c *cobra.Command) error {
	w := c.OutOrStderr()
	var b strings.Builder
	b.WriteString("Usage:\n")
	if c.Runnable() {
		fmt.Fprintf(&b, "  %s\n", c.UseLine())
	}
	if c.HasAvailableSubCommands() {
		fmt.Fprintf(&b, "  %s [command]\n", c.CommandPath())
	}
	if c.HasExample() {
		fmt.Fprintf(&b, "\nExamples:\n%s\n", c.Example)
	}
	if c.HasAvailableSubCommands() {
		b.WriteString("\nAvailable Commands:\n")
		subs := c.Commands()
		sort.Slice(subs, func(i, j int) bool { return subs[i].Name() < subs[j].Name() })
		pad := 0
		for _, s := range subs {
			if s.IsAvailableCommand() || s.Name() == "help" {
				pad = max(pad, len(s.Name()))
			}
		}
		for _, s := range subs {
			if s.IsAvailableCommand() || s.Name() == "help" {
				fmt.Fprintf(&b, "  %-*s   %s\n", pad, s.Name(), s.Short)
			}
		}
	}
	if c.HasAvailableLocalFlags() {
		fmt.Fprintf(&b, "\nFlags:\n%s", flagUsages(c.LocalFlags()))
	}
	if c.HasAvailableInheritedFlags() {
		fmt.Fprintf(&b, "\nFlags of %s:\n%s", c.Parent().CommandPath(), flagUsages(c.InheritedFlags()))
	}
	if c.HasAvailableSubCommands() {
		fmt.Fprintf(&b, "\nUse \"%s [command] --help\" for more about a command.\n", c.CommandPath())
	}
	_, err := io.WriteString(w, b.String())
	return err
}
