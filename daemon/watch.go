package daemon

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"path/filepath"
	"slices"
	"time"

	"github.com/fsnotify/fsnotify"
)

// DefaultDebounce is how long a Watcher waits after the last change in a
// watched directory before it calls its function.
const DefaultDebounce = 200 * time.Millisecond

// Watcher calls a function when the files in some directories change. It
// watches the directories, not the files: an editor or `surmise design`
// replaces a file by renaming a new one over it, and Kubernetes updates a
// mounted ConfigMap by swapping the "..data" symlink to a new timestamped
// directory — neither makes an event with the file's own name, and a watch on
// the old file would be lost with it. Events come in bursts; the function runs
// once the directories have been quiet for the debounce interval, and it
// decides itself, by comparing contents, whether anything it cares about
// changed (Commissioner.ReloadFromDisk).
type Watcher struct {
	dirs     []string
	debounce time.Duration
	fn       func()
	log      *slog.Logger
}

// NewWatcher returns a watcher of the directories of files; debounce zero
// means DefaultDebounce; log may be nil. It starts nothing: Run does.
func NewWatcher(files []string, debounce time.Duration, fn func(), log *slog.Logger) *Watcher {
	if debounce <= 0 {
		debounce = DefaultDebounce
	}
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	w := &Watcher{debounce: debounce, fn: fn, log: log}
	for _, f := range files {
		d := filepath.Clean(filepath.Dir(f))
		if !slices.Contains(w.dirs, d) {
			w.dirs = append(w.dirs, d)
		}
	}
	return w
}

// Dirs returns the directories watched.
func (w *Watcher) Dirs() []string { return slices.Clone(w.dirs) }

// Run watches until ctx is done. Once the watches are in place it calls the
// function once, so that a change made between reading the files and
// watching them is not missed. It returns an error only when the watches
// cannot be set up.
func (w *Watcher) Run(ctx context.Context) error {
	fw, err := fsnotify.NewWatcher()
	if err != nil {
		return fmt.Errorf("watching gains files: %w", err)
	}
	defer fw.Close()
	for _, d := range w.dirs {
		if err := fw.Add(d); err != nil {
			return fmt.Errorf("watching directory %s: %w", d, err)
		}
	}
	w.log.Debug("watching for changes", "dirs", w.dirs)
	w.fn()
	timer := time.NewTimer(w.debounce)
	timer.Stop()
	for {
		select {
		case <-ctx.Done():
			timer.Stop()
			return nil
		case ev, ok := <-fw.Events:
			if !ok {
				return nil
			}
			if ev.Op == fsnotify.Chmod {
				continue
			}
			if ev.Has(fsnotify.Remove|fsnotify.Rename) && slices.Contains(w.dirs, filepath.Clean(ev.Name)) {
				w.log.Warn("a watched directory went away: changes in it are no longer seen until restart", "dir", ev.Name)
			}
			timer.Reset(w.debounce)
		case err, ok := <-fw.Errors:
			if !ok {
				return nil
			}
			if errors.Is(err, fsnotify.ErrEventOverflow) {
				// Events were lost: look at the files anyway.
				timer.Reset(w.debounce)
			}
			w.log.Warn("file watch error", "error", err)
		case <-timer.C:
			w.fn()
		}
	}
}
