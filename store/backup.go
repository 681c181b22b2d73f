package store

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
)

// Backup writes a consistent copy of the database file at path to out, with
// SQLite's VACUUM INTO: the copy is one read transaction's snapshot, taken
// while a server may go on writing (WAL lets readers and the writer run
// side by side). out must not exist; the copy is written beside it under a
// temporary name, checked with PRAGMA integrity_check, flushed to disk and
// only then renamed into place, so a failed backup leaves nothing at out.
// It returns the size of the copy in bytes.
func Backup(ctx context.Context, path, out string) (int64, error) {
	if path == "" || out == "" {
		return 0, errors.New("backup: both the database and the output file are needed")
	}
	if _, err := os.Stat(path); err != nil {
		return 0, fmt.Errorf("backup: database %q: %w", path, err)
	}
	if _, err := os.Stat(out); err == nil {
		return 0, fmt.Errorf("backup: %q already exists; choose a new file name", out)
	} else if !errors.Is(err, fs.ErrNotExist) {
		return 0, fmt.Errorf("backup: %q: %w", out, err)
	}
	src, err := sql.Open("sqlite", "file:"+path+"?_pragma=busy_timeout(10000)")
	if err != nil {
		return 0, fmt.Errorf("backup: open %q: %w", path, err)
	}
	defer src.Close()
	src.SetMaxOpenConns(1)
	var tables int
	if err := src.QueryRowContext(ctx, `SELECT COUNT(*) FROM sqlite_master WHERE type = 'table' AND name IN ('sessions', 'turns', 'studies')`).Scan(&tables); err != nil {
		return 0, fmt.Errorf("backup: read %q: %w", path, err)
	}
	if tables != 3 {
		return 0, fmt.Errorf("backup: %q is not a Trialogue database (it has no sessions, turns and studies tables)", path)
	}
	tmp, err := os.CreateTemp(filepath.Dir(out), "."+filepath.Base(out)+".partial-*")
	if err != nil {
		return 0, fmt.Errorf("backup: %w", err)
	}
	tmpName := tmp.Name()
	tmp.Close()
	os.Remove(tmpName) // VACUUM INTO wants to create the file itself
	defer os.Remove(tmpName)
	if _, err := src.ExecContext(ctx, `VACUUM INTO ?`, tmpName); err != nil {
		return 0, fmt.Errorf("backup: copy %q: %w", path, err)
	}
	if err := checkIntegrity(ctx, tmpName); err != nil {
		return 0, fmt.Errorf("backup: the copy of %q: %w", path, err)
	}
	f, err := os.Open(tmpName)
	if err != nil {
		return 0, fmt.Errorf("backup: %w", err)
	}
	err = f.Sync()
	info, serr := f.Stat()
	f.Close()
	if err = errors.Join(err, serr); err != nil {
		return 0, fmt.Errorf("backup: flush the copy: %w", err)
	}
	if _, err := os.Stat(out); err == nil {
		return 0, fmt.Errorf("backup: %q appeared while copying; choose a new file name", out)
	}
	if err := os.Rename(tmpName, out); err != nil {
		return 0, fmt.Errorf("backup: %w", err)
	}
	if d, err := os.Open(filepath.Dir(out)); err == nil {
		d.Sync() // make the rename durable where the file system allows it
		d.Close()
	}
	return info.Size(), nil
}

// checkIntegrity runs SQLite's integrity check on a database file.
func checkIntegrity(ctx context.Context, path string) error {
	db, err := sql.Open("sqlite", "file:"+path+"?_pragma=query_only(1)")
	if err != nil {
		return err
	}
	defer db.Close()
	var res string
	if err := db.QueryRowContext(ctx, `PRAGMA integrity_check`).Scan(&res); err != nil {
		return fmt.Errorf("integrity check: %w", err)
	}
	if res != "ok" {
		return fmt.Errorf("integrity check: %s", res)
	}
	return nil
}
