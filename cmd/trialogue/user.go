package main

import (
	"bufio"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"strings"
	"text/tabwriter"

	"trialogue/store"
)

// userUsage is the usage of the user command.
const userUsage = `usage:
  trialogue user add EMAIL --role owner|viewer --db PATH [--password-stdin]
  trialogue user reset EMAIL --db PATH [--password-stdin]
  trialogue user list --db PATH`

// runUser manages researcher accounts of the console: trialogue user
// add|reset|list. Without --password-stdin, add and reset print a
// generated password that is good for one sign-in.
func runUser(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	if len(args) == 0 {
		fmt.Fprintln(stderr, userUsage)
		return exitUsage
	}
	sub := args[0]
	fs := flag.NewFlagSet("trialogue user "+sub, flag.ContinueOnError)
	fs.SetOutput(stderr)
	db := fs.String("db", "", dbUsage)
	role := fs.String("role", "", "the account's role: owner (changes studies) or viewer (reads and exports)")
	fromStdin := fs.Bool("password-stdin", false, "read the password from the first line of standard input instead of generating one")
	// The address comes first (trialogue user add EMAIL --role ...), and
	// the flag package stops at the first argument: take it out first.
	var email string
	rest := args[1:]
	if len(rest) > 0 && !strings.HasPrefix(rest[0], "-") {
		email, rest = rest[0], rest[1:]
	}
	if err := fs.Parse(rest); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		return exitUsage
	}
	if email == "" && fs.NArg() > 0 {
		email = fs.Arg(0)
	} else if fs.NArg() > 0 {
		fmt.Fprintf(stderr, "trialogue user %s: unexpected argument %q\n%s\n", sub, fs.Arg(0), userUsage)
		return exitUsage
	}
	switch {
	case sub != "add" && sub != "reset" && sub != "list":
		fmt.Fprintf(stderr, "trialogue user: unknown subcommand %q\n%s\n", sub, userUsage)
		return exitUsage
	case *db == "":
		fmt.Fprintf(stderr, "trialogue user %s: --db PATH is required\n%s\n", sub, userUsage)
		return exitUsage
	case sub != "list" && email == "":
		fmt.Fprintf(stderr, "trialogue user %s: give the account's e-mail address\n%s\n", sub, userUsage)
		return exitUsage
	case sub == "add" && *role != store.RoleOwner && *role != store.RoleViewer:
		fmt.Fprintf(stderr, "trialogue user add: --role must be owner or viewer, not %q\n", *role)
		return exitUsage
	case sub != "add" && *role != "":
		fmt.Fprintf(stderr, "trialogue user %s: --role applies to add only\n", sub)
		return exitUsage
	}
	if sub != "list" {
		norm, err := store.NormalizeEmail(email)
		if err != nil {
			fmt.Fprintf(stderr, "trialogue user %s: %v\n", sub, err)
			return exitUsage
		}
		email = norm
	}
	password, generated := "", !*fromStdin
	if *fromStdin {
		line, err := bufio.NewReader(io.LimitReader(stdin, store.MaxPassword+2)).ReadString('\n')
		if err != nil && !errors.Is(err, io.EOF) {
			fmt.Fprintf(stderr, "trialogue user %s: read the password: %v\n", sub, err)
			return exitFail
		}
		password = strings.TrimRight(line, "\r\n")
		if err := store.CheckPassword(password); err != nil {
			fmt.Fprintf(stderr, "trialogue user %s: %v\n", sub, err)
			return exitUsage
		}
	} else if sub != "list" {
		password = store.NewPassword()
	}

	// Accounts may be added before the first start of the server, which
	// creates the database; reset and list need one.
	if sub != "add" {
		if !dbExists(*db, stderr) {
			return exitUsage
		}
	}
	st, err := store.Open(ctx, *db, store.Options{})
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	defer st.Close()

	var inv *store.InvalidError
	switch sub {
	case "list":
		users, err := st.Users(ctx)
		if err != nil {
			fmt.Fprintf(stderr, "trialogue: %v\n", err)
			return exitFail
		}
		if len(users) == 0 {
			fmt.Fprintln(stdout, "No console accounts yet: add one with trialogue user add EMAIL --role owner --db PATH")
			return exitOK
		}
		tw := tabwriter.NewWriter(stdout, 0, 4, 2, ' ', 0)
		fmt.Fprintln(tw, "e-mail\trole\tcreated\tpassword")
		for _, u := range users {
			pw := "set"
			if u.MustChange {
				pw = "one-time, not yet replaced"
			}
			fmt.Fprintf(tw, "%s\t%s\t%s\t%s\n", u.Email, u.Role, u.CreatedAt.Format(store.TimeFormat), pw)
		}
		if err := tw.Flush(); err != nil {
			fmt.Fprintf(stderr, "trialogue: %v\n", err)
			return exitFail
		}
		return exitOK
	case "add":
		u, err := st.AddUser(ctx, email, *role, password, generated)
		if errors.As(err, &inv) {
			fmt.Fprintf(stderr, "trialogue user add: %s\n", inv.Msg)
			return exitUsage
		}
		if err != nil {
			fmt.Fprintf(stderr, "trialogue: %v\n", err)
			return exitFail
		}
		fmt.Fprintf(stdout, "Added %s as %s.\n", u.Email, u.Role)
	case "reset":
		u, err := st.UserByEmail(ctx, email)
		if errors.Is(err, store.ErrNotFound) {
			fmt.Fprintf(stderr, "trialogue user reset: no account for %s (trialogue user list shows them)\n", email)
			return exitUsage
		}
		if err == nil {
			err = st.SetPassword(ctx, u.ID, password, generated)
		}
		if err != nil {
			fmt.Fprintf(stderr, "trialogue: %v\n", err)
			return exitFail
		}
		fmt.Fprintf(stdout, "The password of %s is replaced and its console sessions are ended.\n", u.Email)
	}
	if generated {
		fmt.Fprintf(stdout, "One-time password (shown only now; the first sign-in must replace it):\n  %s\n", password)
	}
	fmt.Fprintln(stdout, "Sign in at /console/login on the server that uses this database.")
	return exitOK
}

// demoEmail is the demo's owner account (example.org is reserved for
// examples by RFC 2606).
const demoEmail = "demo-owner@example.org"

// demoOwner gives the demo's owner account a new password, creating the
// account if needed, and returns its address and password.
func demoOwner(ctx context.Context, st *store.Store) (email, password string, err error) {
	password = store.NewPassword()
	u, err := st.UserByEmail(ctx, demoEmail)
	switch {
	case errors.Is(err, store.ErrNotFound):
		_, err = st.AddUser(ctx, demoEmail, store.RoleOwner, password, false)
	case err == nil:
		err = st.SetPassword(ctx, u.ID, password, false)
	}
	if err != nil {
		return "", "", fmt.Errorf("demo console account: %w", err)
	}
	return demoEmail, password, nil
}
