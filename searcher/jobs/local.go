package jobs

import (
	"context"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
)

// local serves a Manager's jobs as a Service.
type local struct{ m *Manager }

// ManagerService serves m's jobs as a Service.
func ManagerService(m *Manager) Service { return local{m} }

var _ Service = local{}

func (l local) Submit(_ context.Context, spec Spec) (Status, error) { return l.m.Submit(spec) }

func (l local) List(context.Context) ([]Status, error) { return l.m.List(), nil }

func (l local) Get(_ context.Context, id string) (Status, error) { return l.m.Get(id) }

func (l local) Cancel(_ context.Context, id string) (Status, error) { return l.m.Cancel(id) }

func (l local) History(_ context.Context, id string) (History, error) { return l.m.History(id) }

// Output reads a file from the job's output directory.
func (l local) Output(_ context.Context, id, name string) ([]byte, error) {
	if _, err := l.m.Get(id); err != nil {
		return nil, err
	}
	b, err := os.ReadFile(filepath.Join(l.m.Out(id), name))
	if errors.Is(err, fs.ErrNotExist) {
		return nil, fmt.Errorf("%w: job %s has no %s yet", ErrNoOutput, id, name)
	}
	return b, err
}
