//go:build !unix

package daemon

import "io/fs"

// fileOwner is unknown off Unix.
func fileOwner(fs.FileInfo) (int, bool) { return 0, false }
