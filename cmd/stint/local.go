package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"io/fs"
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
		download, downloadOnly  bool
	)
	cmd := &cobra.Command{
		Use:   "local",
		Short: "Serve a small local GGUF model on the completions wire format",
		Long: `Serve a small Llama-architecture GGUF model, run on the CPU in pure Go, on
POST /v1/completions, POST /v1/chat/completions and GET /v1/models (and
GET /healthz, as the proxy answers it). Errors have the proxy's body,
{"error":{"message","type","param","code"}}.

The model file is --model PATH, else $STINT_MODEL, else a copy downloaded
earlier into the user cache dir. With --download, when that file is missing,
the default model (stories260K.gguf) is fetched there once from its public
source and checked against its SHA-256; --download-only does the same and
exits instead of serving.`,
		Example: `  stint local --download-only                 # fetch the default model into the user cache dir
  stint local --download-only --model ./stories260K.gguf
  stint local --model ./stories260K.gguf --listen 127.0.0.1:8788`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			ctx := cmd.Context()
			if ctx == nil {
				ctx = context.Background()
			}
			if download || downloadOnly {
				path, err := downloadModel(ctx, cmd.ErrOrStderr(), modelPath, os.Getenv)
				if err != nil {
					return err
				}
				if downloadOnly {
					return nil
				}
				modelPath = path
			}
			path, err := localmodel.Locate(modelPath, os.Getenv)
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
	f.StringVar(&modelPath, "model", "", "GGUF model file")
	f.StringVar(&listen, "listen", "127.0.0.1:8788", "address to listen on")
	f.StringVar(&name, "name", "", "model id to report")
	f.IntVar(&workers, "workers", 0, "requests computed at once")
	f.BoolVar(&download, "download", false, "download the default model to the model file's path (--model, $STINT_MODEL, else the user cache dir) if it is missing, then serve")
	f.BoolVar(&downloadOnly, "download-only", false, "as --download, then exit without serving")
	describeFlag(f, "model", "FILE", "$STINT_MODEL, else the downloaded copy in the user cache dir")
	describeFlag(f, "listen", "ADDR", "")
	describeFlag(f, "name", "NAME", localmodel.DefaultName)
	describeFlag(f, "workers", "N", "the number of CPUs")
	return cmd
}

// modelTarget is where the model file is expected: flagPath, else
// getenv(ModelEnv), else the cached download's path, as localmodel.Locate
// looks; from names which of the three it is, as the user would set it.
func modelTarget(flagPath string, getenv func(string) string) (path, from string, err error) {
	switch {
	case flagPath != "":
		return flagPath, "--model", nil
	case getenv(localmodel.ModelEnv) != "":
		return getenv(localmodel.ModelEnv), localmodel.ModelEnv, nil
	}
	path, err = localmodel.CachePath()
	if err != nil {
		return "", "", fmt.Errorf("no --model, %s unset, and no user cache dir to download into: %w", localmodel.ModelEnv, err)
	}
	return path, "the user cache dir", nil
}

// downloadModel fetches the default model to modelTarget's path unless a
// file is there already, and returns the path.
func downloadModel(ctx context.Context, log io.Writer, flagPath string, getenv func(string) string) (string, error) {
	path, _, err := modelTarget(flagPath, getenv)
	if err != nil {
		return "", err
	}
	switch _, err := os.Stat(path); {
	case err == nil:
		fmt.Fprintf(log, "stint local: %s is already there; not downloaded again\n", path)
		return path, nil
	case !errors.Is(err, fs.ErrNotExist):
		return "", err
	}
	fmt.Fprintf(log, "stint local: downloading %s to %s\n", localmodel.ModelURL, path)
	if err := localmodel.Fetch(ctx, nil, localmodel.ModelURL, path, localmodel.ModelSHA256); err != nil {
		return "", err
	}
	fmt.Fprintf(log, "stint local: %s downloaded, sha256 %s\n", path, localmodel.ModelSHA256)
	return path, nil
}
