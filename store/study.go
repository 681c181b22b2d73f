package store

import (
	"context"
	"database/sql"
	"errors"
	"fmt"

	"trialogue/arms"
	"trialogue/arms/codes"
)

// StudyVersion is a study as the database knows it: the version of its file
// now in force, and the secrets that never leave the server.
type StudyVersion struct {
	ID      string
	Version int    // 1 for the first file registered, then one more per change
	Hash    string // SHA-256 of the canonical form
	Secret  []byte // HMAC key of completion codes
	Seed    []byte // allocation seed
}

// RegisterStudy records a study file. A new study gets a fresh secret and
// allocation seed; a file whose canonical form differs from every stored
// version becomes the next version; a known file returns its version.
func (s *Store) RegisterStudy(ctx context.Context, st *arms.Study, source []byte) (StudyVersion, error) {
	canonical, err := st.Canonical()
	if err != nil {
		return StudyVersion{}, err
	}
	hash := codes.SHA256Hex(canonical)
	at := s.now()
	now := fmtTime(at)
	sv := StudyVersion{ID: st.ID, Hash: hash}
	err = s.wr.do(ctx, st.ID, func(ctx context.Context, tx *Tx) error {
		err := tx.QueryRowContext(ctx, `SELECT secret, seed FROM studies WHERE id = ?`, st.ID).Scan(&sv.Secret, &sv.Seed)
		if errors.Is(err, sql.ErrNoRows) {
			sv.Secret, sv.Seed = codes.NewSecret(), codes.NewSecret()
			_, err = tx.ExecContext(ctx, `INSERT INTO studies (id, secret, seed, created_at) VALUES (?, ?, ?, ?)`, st.ID, sv.Secret, sv.Seed, now)
		}
		if err != nil {
			return err
		}
		err = tx.QueryRowContext(ctx, `SELECT version FROM study_versions WHERE study_id = ? AND hash = ?`, st.ID, hash).Scan(&sv.Version)
		if errors.Is(err, sql.ErrNoRows) {
			if err := checkFrozen(ctx, tx, st); err != nil {
				return err
			}
			err = tx.QueryRowContext(ctx, `SELECT COALESCE(MAX(version), 0) + 1 FROM study_versions WHERE study_id = ?`, st.ID).Scan(&sv.Version)
			if err == nil {
				_, err = tx.ExecContext(ctx, `INSERT INTO study_versions (study_id, version, hash, canonical, source, created_at) VALUES (?, ?, ?, ?, ?, ?)`,
					st.ID, sv.Version, hash, string(canonical), string(source), now)
			}
			if err == nil {
				err = appendChain(ctx, tx, st.ID, EventVersion, at, map[string]any{"version": sv.Version, "hash": hash})
			}
		}
		return err
	})
	if err != nil {
		return StudyVersion{}, fmt.Errorf("register study %q: %w", st.ID, err)
	}
	return sv, nil
}

// Study returns the newest version of a study.
func (s *Store) Study(ctx context.Context, id string) (StudyVersion, error) {
	sv := StudyVersion{ID: id}
	err := s.rs.QueryRowContext(ctx, `SELECT s.secret, s.seed, v.version, v.hash FROM studies s
		JOIN study_versions v ON v.study_id = s.id WHERE s.id = ? ORDER BY v.version DESC LIMIT 1`, id).
		Scan(&sv.Secret, &sv.Seed, &sv.Version, &sv.Hash)
	if errors.Is(err, sql.ErrNoRows) {
		return sv, fmt.Errorf("study %q: %w", id, ErrNotFound)
	}
	if err != nil {
		return sv, fmt.Errorf("study %q: %w", id, err)
	}
	return sv, nil
}

// StudyCanonical returns the canonical form of a version: what was hashed.
func (s *Store) StudyCanonical(ctx context.Context, id string, version int) ([]byte, error) {
	var c string
	err := s.rs.QueryRowContext(ctx, `SELECT canonical FROM study_versions WHERE study_id = ? AND version = ?`, id, version).Scan(&c)
	if errors.Is(err, sql.ErrNoRows) {
		return nil, fmt.Errorf("study %q version %d: %w", id, version, ErrNotFound)
	}
	if err != nil {
		return nil, fmt.Errorf("study %q version %d: %w", id, version, err)
	}
	return []byte(c), nil
}

// StudySource returns the study file of a version as it was registered.
func (s *Store) StudySource(ctx context.Context, id string, version int) ([]byte, error) {
	var src string
	err := s.rs.QueryRowContext(ctx, `SELECT source FROM study_versions WHERE study_id = ? AND version = ?`, id, version).Scan(&src)
	if errors.Is(err, sql.ErrNoRows) {
		return nil, fmt.Errorf("study %q version %d: %w", id, version, ErrNotFound)
	}
	if err != nil {
		return nil, fmt.Errorf("study %q version %d: %w", id, version, err)
	}
	return []byte(src), nil
}
