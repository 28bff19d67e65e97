package main

import (
	"context"
	"errors"
	"fmt"
	"net"
	"net/http"
	"os"
	"time"

	"github.com/spf13/cobra"

	"github.com/stintlab/stint/proxy/localmodel"
)

// newLocalCmd builds `stint local`, which serves a GGUF model on the
// completions wire format.
func newLocalCmd() *cobra.Command {
	var (
		modelPath, listen, name string
		workers                 int
		download                bool
	)
	cmd := &cobra.Command{
		Use:   "local",
		Short: "Serve a small local GGUF model on the completions wire format",
		Long: `Serve a small Llama-architecture GGUF model, run on the CPU in pure Go, on
POST /v1/completions, POST /v1/chat/completions and GET /v1/models.

The model file is --model PATH, else $STINT_MODEL, else a copy downloaded
earlier into the user cache dir. With --download, a missing default model
(stories260K.gguf) is fetched once from its public source and checked
against its SHA-256.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			ctx := cmd.Context()
			if ctx == nil {
				ctx = context.Background()
			}
			path, err := localmodel.Locate(modelPath, os.Getenv)
			if errors.Is(err, localmodel.ErrModelNotFound) && download && modelPath == "" && os.Getenv(localmodel.ModelEnv) == "" {
				if path, err = localmodel.CachePath(); err == nil {
					fmt.Fprintf(cmd.ErrOrStderr(), "stint local: downloading %s to %s\n", localmodel.ModelURL, path)
					err = localmodel.Fetch(ctx, nil, localmodel.ModelURL, path, localmodel.ModelSHA256)
				}
			}
			if err != nil {
				return err
			}
			m, err := localmodel.Load(path)
			if err != nil {
				return err
			}
			ln, err := net.Listen("tcp", listen)
			if err != nil {
				return fmt.Errorf("listen: %w", err)
			}
			srv := &http.Server{
				Handler:           localmodel.NewHandler(m, localmodel.HandlerOptions{Name: name, Workers: workers}),
				ReadHeaderTimeout: 10 * time.Second,
			}
			fmt.Fprintf(cmd.ErrOrStderr(), "stint local: serving %s on http://%s\n", path, ln.Addr())
			errc := make(chan error, 1)
			go func() { errc <- srv.Serve(ln) }()
			select {
			case err := <-errc:
				return fmt.Errorf("serve: %w", err)
			case <-ctx.Done():
			}
			shutdownCtx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 10*time.Second)
			defer cancel()
			if err := srv.Shutdown(shutdownCtx); err != nil {
				return fmt.Errorf("shutdown: %w", err)
			}
			return nil
		},
	}
	f := cmd.Flags()
	f.StringVar(&modelPath, "model", "", "GGUF model file (default $STINT_MODEL, else the cached download)")
	f.StringVar(&listen, "listen", "127.0.0.1:8788", "address to listen on")
	f.StringVar(&name, "name", "", "model id to report (default "+localmodel.DefaultName+")")
	f.IntVar(&workers, "workers", 0, "requests computed at once (default: number of CPUs)")
	f.BoolVar(&download, "download", false, "download the default model into the user cache dir if it is missing")
	return cmd
}
