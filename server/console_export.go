package server

import (
	"archive/zip"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"os"
	"path/filepath"
	"strconv"
	"time"

	"trialogue/store"
)

// handleExport writes a study's export (sessions.csv, turns.csv,
// turns.jsonl, codebook.md) into a temporary folder and sends it as one
// zip archive, for owners and viewers alike. Pilot and synthetic sessions
// are left out unless asked for; release=1 writes the shareable copy.
//
// GET /console/studies/{study}/export.zip[?pilot=1][&synthetic=1][&release=1]
func (s *Server) handleExport(w http.ResponseWriter, r *http.Request) {
	cs := consoleStudyOf(r.Context())
	q := r.URL.Query()
	var opt store.ExportOptions
	for _, o := range []struct {
		key string
		to  *bool
	}{{"pilot", &opt.IncludePilot}, {"synthetic", &opt.IncludeSynthetic}, {"release", &opt.Release}} {
		switch q.Get(o.key) {
		case "", "0":
		case "1":
			*o.to = true
		default:
			s.consoleFail(w, r, &Error{Status: http.StatusBadRequest, Msg: fmt.Sprintf("%s must be 1 or left out, not %q.", o.key, q.Get(o.key))})
			return
		}
	}
	dir, err := os.MkdirTemp("", "trialogue-export-")
	if err != nil {
		s.consoleFail(w, r, fmt.Errorf("export folder: %w", err))
		return
	}
	defer os.RemoveAll(dir)
	files := filepath.Join(dir, "files")
	sum, err := s.store.Export(r.Context(), cs.Def, cs.Def.ID, files, opt)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	now := s.Now().UTC()
	name := cs.Def.ID + "-export-" + now.Format("20060102T150405Z")
	if opt.Release {
		name += "-release"
	}
	archive := filepath.Join(dir, name+".zip")
	if err := zipFiles(archive, files, name, sum.Files, now); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	f, err := os.Open(archive)
	if err != nil {
		s.consoleFail(w, r, fmt.Errorf("export archive: %w", err))
		return
	}
	defer f.Close()
	fi, err := f.Stat()
	if err != nil {
		s.consoleFail(w, r, fmt.Errorf("export archive: %w", err))
		return
	}
	u := consoleUser(r.Context())
	s.log.Info("console export", slog.String("study", cs.Def.ID), slog.Int64("user", u.ID), slog.Int("sessions", sum.Sessions),
		slog.Int("turns", sum.Turns), slog.Bool("release", opt.Release))
	h := w.Header()
	h.Set("Content-Type", "application/zip")
	// RFC 6266: a download, under this name (study ids are [a-z0-9-]).
	h.Set("Content-Disposition", `attachment; filename="`+name+`.zip"`)
	h.Set("Content-Length", strconv.FormatInt(fi.Size(), 10))
	w.WriteHeader(http.StatusOK)
	io.Copy(w, f)
}

// zipFiles writes the named files of dir into a zip archive at path, in a
// folder called folder, with the time given.
func zipFiles(path, dir, folder string, names []string, at time.Time) (err error) {
	out, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("export archive: %w", err)
	}
	defer func() {
		if cerr := out.Close(); err == nil && cerr != nil {
			err = fmt.Errorf("export archive: %w", cerr)
		}
	}()
	zw := zip.NewWriter(out)
	for _, n := range names {
		src, err := os.Open(filepath.Join(dir, n))
		if err != nil {
			return fmt.Errorf("export archive: %w", err)
		}
		hdr := &zip.FileHeader{Name: folder + "/" + n, Method: zip.Deflate, Modified: at}
		dst, err := zw.CreateHeader(hdr)
		if err == nil {
			_, err = io.Copy(dst, src)
		}
		src.Close()
		if err != nil {
			return fmt.Errorf("export archive: %s: %w", n, err)
		}
	}
	if err := zw.Close(); err != nil {
		return fmt.Errorf("export archive: %w", err)
	}
	return nil
}
