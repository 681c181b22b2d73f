package analysis

import (
	"archive/zip"
	"errors"
	"fmt"
	"io"
	"time"

	"trialogue/arms"
)

// Files are the names of the files an effects analysis writes, in the
// order WriteFiles writes them.
var Files = []string{"effects.csv", "balance.csv", "attrition.csv", "effects.json", "effects.svg"}

// Run reads an outcome file and analyses each of the outcome columns with
// the spec (its Outcome is set per column). It is the whole effects
// pipeline, shared by the command and the console; bad input is an
// *InputError.
func Run(study *arms.Study, units []Unit, outcomes io.Reader, name string, columns []string, spec Spec) ([]*Report, error) {
	tab, err := ReadOutcomes(outcomes, name)
	if err != nil {
		return nil, err
	}
	return AnalyzeAll(study, units, tab, columns, spec)
}

// AnalyzeAll analyses each of the outcome columns of a table that has been
// read, stopping at the first that cannot be analysed.
func AnalyzeAll(study *arms.Study, units []Unit, tab *Table, columns []string, spec Spec) ([]*Report, error) {
	if len(columns) == 0 {
		return nil, inputErr("name at least one outcome column")
	}
	reps := make([]*Report, 0, len(columns))
	for _, col := range columns {
		sp := spec
		sp.Outcome = col
		rep, err := Analyze(study, units, tab, sp)
		if err != nil {
			return nil, err
		}
		reps = append(reps, rep)
	}
	return reps, nil
}

// WriteFiles writes the files of Files through create, which opens a named
// file: the command's creates them in a folder, the console's in a zip
// archive. Balance does not depend on the outcome and attrition is that of
// the first outcome (the JSON has every outcome's). Every file is
// attempted; the errors are joined.
func WriteFiles(create func(name string) (io.WriteCloser, error), reps []*Report) error {
	if len(reps) == 0 {
		return errors.New("write effects files: no reports")
	}
	write := func(name string, fn func(io.Writer) error) error {
		wc, err := create(name)
		if err != nil {
			return err
		}
		if err := fn(wc); err != nil {
			wc.Close()
			return err
		}
		if err := wc.Close(); err != nil {
			return fmt.Errorf("write %s: %w", name, err)
		}
		return nil
	}
	return errors.Join(
		write("effects.csv", func(w io.Writer) error { return WriteEffectsCSV(w, reps) }),
		write("balance.csv", func(w io.Writer) error { return WriteBalanceCSV(w, reps[0]) }),
		write("attrition.csv", func(w io.Writer) error { return WriteAttritionCSV(w, reps[0]) }),
		write("effects.json", func(w io.Writer) error { return WriteJSON(w, reps) }),
		write("effects.svg", func(w io.Writer) error { return WriteCoefPlot(w, reps) }),
	)
}

// WriteZip writes a zip archive whose files, in one folder, are those
// that files writes through the create function it is given, each dated at.
// It lets the files a command writes into a folder be offered as one
// download.
func WriteZip(w io.Writer, folder string, at time.Time, files func(create func(name string) (io.WriteCloser, error)) error) error {
	zw := zip.NewWriter(w)
	create := func(name string) (io.WriteCloser, error) {
		fw, err := zw.CreateHeader(&zip.FileHeader{Name: folder + "/" + name, Method: zip.Deflate, Modified: at})
		if err != nil {
			return nil, fmt.Errorf("zip %s: %w", name, err)
		}
		return nopCloser{fw}, nil
	}
	if err := files(create); err != nil {
		return err
	}
	if err := zw.Close(); err != nil {
		return fmt.Errorf("zip %s: %w", folder, err)
	}
	return nil
}

// nopCloser is a zip entry: the next entry, or the archive's Close, ends it.
type nopCloser struct{ io.Writer }

func (nopCloser) Close() error { return nil }
