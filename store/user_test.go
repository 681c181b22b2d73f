package store_test

import (
	"context"
	"database/sql"
	"encoding/base64"
	"errors"
	"fmt"
	"regexp"
	"strings"
	"testing"
	"time"

	"golang.org/x/crypto/argon2"

	"trialogue/store"
)

const testPassword = "larch-meadow-ferry-42"

func TestUsers(t *testing.T) {
	ctx := context.Background()
	st := mustOpen(t, "")
	u, err := st.AddUser(ctx, "Ada.Lindqvist@Example.org", store.RoleOwner, testPassword, true)
	if err != nil {
		t.Fatal(err)
	}
	t.Run("OKStoredLowercaseWithArgon2idHash", func(t *testing.T) {
		if u.Email != "ada.lindqvist@example.org" || u.Role != store.RoleOwner || !u.MustChange || !u.CanChange() {
			t.Errorf("got %+v, want the lowercase address, owner, must change", u)
		}
		sqliteOnly(t)
		var hash string
		db, err := sql.Open("sqlite", "file:"+st.Path())
		if err != nil {
			t.Fatal(err)
		}
		defer db.Close()
		if err := db.QueryRow(`SELECT password_hash FROM users WHERE id = ?`, u.ID).Scan(&hash); err != nil {
			t.Fatal(err)
		}
		// The PHC string format of the Password Hashing Competition, as
		// argon2's reference implementation writes it (RFC 9106 names the
		// parameters m, t and p; version 0x13 = 19).
		if !regexp.MustCompile(`^\$argon2id\$v=19\$m=\d+,t=\d+,p=\d+\$[A-Za-z0-9+/]{22}\$[A-Za-z0-9+/]{43}$`).MatchString(hash) || strings.Contains(hash, testPassword) {
			t.Errorf("got stored hash %q, want an argon2id PHC string without the password", hash)
		}
	})
	t.Run("OKAuthenticateAnyCase", func(t *testing.T) {
		got, err := st.Authenticate(ctx, " ADA.LINDQVIST@example.org ", testPassword)
		if err != nil || got.ID != u.ID {
			t.Fatalf("got %+v, %v; want user %d", got, err, u.ID)
		}
	})
	for _, c := range []struct{ name, email, pw string }{
		{"ErrWrongPassword", "ada.lindqvist@example.org", testPassword + "x"},
		{"ErrUnknownAddress", "nobody@example.org", testPassword},
		{"ErrEmptyPassword", "ada.lindqvist@example.org", ""},
	} {
		t.Run(c.name, func(t *testing.T) {
			if _, err := st.Authenticate(ctx, c.email, c.pw); !errors.Is(err, store.ErrBadLogin) {
				t.Fatalf("got %v, want ErrBadLogin", err)
			}
		})
	}
	for _, c := range []struct{ name, email, role, pw, msg string }{
		{"ErrDuplicate", "ADA.LINDQVIST@example.org", store.RoleViewer, testPassword, "exists already"},
		{"ErrRole", "bo@example.org", "admin", testPassword, "role must be owner or viewer"},
		{"ErrShortPassword", "bo@example.org", store.RoleViewer, "short-pw", "shorter than 12"},
		{"ErrDisplayName", "Bo <bo@example.org>", store.RoleViewer, testPassword, "not an e-mail address"},
		{"ErrNoAt", "bo.example.org", store.RoleViewer, testPassword, "not an e-mail address"},
	} {
		t.Run(c.name, func(t *testing.T) {
			_, err := st.AddUser(ctx, c.email, c.role, c.pw, false)
			var ie *store.InvalidError
			if !errors.As(err, &ie) || !strings.Contains(ie.Msg, c.msg) {
				t.Fatalf("got %v, want an InvalidError containing %q", err, c.msg)
			}
			if users, _ := st.Users(ctx); len(users) != 1 {
				t.Errorf("got %d users, want 1: a refused account was stored", len(users))
			}
		})
	}
	t.Run("OKSetPasswordEndsSessions", func(t *testing.T) {
		token, err := st.NewConsoleSession(ctx, u.ID)
		if err != nil {
			t.Fatal(err)
		}
		if err := st.SetPassword(ctx, u.ID, "new-"+testPassword, false); err != nil {
			t.Fatal(err)
		}
		if _, err := st.ConsoleUser(ctx, token, time.Hour, time.Hour); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("old session: got %v, want ErrNotFound", err)
		}
		got, err := st.Authenticate(ctx, u.Email, "new-"+testPassword)
		if err != nil || got.MustChange {
			t.Errorf("got %+v, %v; want a sign-in with the new password and no change due", got, err)
		}
		if _, err := st.Authenticate(ctx, u.Email, testPassword); !errors.Is(err, store.ErrBadLogin) {
			t.Errorf("old password: got %v, want ErrBadLogin", err)
		}
	})
	t.Run("ErrSetPasswordUnknownUser", func(t *testing.T) {
		if err := st.SetPassword(ctx, 999, testPassword, false); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("got %v, want ErrNotFound", err)
		}
	})
}

func TestPasswordHash(t *testing.T) {
	t.Run("OKOtherParametersStillCheck", func(t *testing.T) {
		// A hash made with other parameters is checked with its own.
		salt := []byte("0123456789abcdef")
		key := argon2.IDKey([]byte(testPassword), salt, 1, 8*1024, 2, 32)
		enc := base64.RawStdEncoding
		hash := fmt.Sprintf("$argon2id$v=19$m=8192,t=1,p=2$%s$%s", enc.EncodeToString(salt), enc.EncodeToString(key))
		ok, err := store.CheckPasswordHash(hash, testPassword)
		if err != nil || !ok {
			t.Fatalf("got %v, %v; want a match", ok, err)
		}
		if ok, _ := store.CheckPasswordHash(hash, testPassword+"!"); ok {
			t.Error("got a match for another password, want none")
		}
	})
	for _, c := range []struct{ name, hash string }{
		{"ErrNotArgon2id", "$2a$10$abcdefghijklmnopqrstuv"},
		{"ErrBadParameters", "$argon2id$v=19$m=0,t=1,p=1$MDEyMzQ1Njc4OWFiY2RlZg$AAAA"},
		{"ErrOtherVersion", "$argon2id$v=16$m=8,t=1,p=1$MDEyMzQ1Njc4OWFiY2RlZg$AAAA"},
	} {
		t.Run(c.name, func(t *testing.T) {
			if ok, err := store.CheckPasswordHash(c.hash, testPassword); err == nil || ok {
				t.Errorf("got %v, %v; want an error", ok, err)
			}
		})
	}
	t.Run("OKNewPassword", func(t *testing.T) {
		seen := map[string]bool{}
		for range 20 {
			pw := store.NewPassword()
			if !regexp.MustCompile(`^[a-z2-7]{4}(-[a-z2-7]{4}){4}$`).MatchString(pw) || store.CheckPassword(pw) != nil || seen[pw] {
				t.Fatalf("got %q, want five new groups of four base32 characters that pass the rules", pw)
			}
			seen[pw] = true
		}
	})
}

// TestConsoleSessions: a session ends after idle time or its maximum age;
// use within the idle time keeps it alive.
func TestConsoleSessions(t *testing.T) {
	ctx := context.Background()
	st := mustOpen(t, "")
	clock := time.Date(2027, 5, 4, 9, 0, 0, 0, time.UTC)
	st.Now = func() time.Time { return clock }
	u, err := st.AddUser(ctx, "lena@example.org", store.RoleViewer, testPassword, false)
	if err != nil {
		t.Fatal(err)
	}
	const idle, maxAge = 30 * time.Minute, 12 * time.Hour
	token, err := st.NewConsoleSession(ctx, u.ID)
	if err != nil {
		t.Fatal(err)
	}
	t.Run("OKUseKeepsItAlive", func(t *testing.T) {
		for range 3 {
			clock = clock.Add(20 * time.Minute)
			got, err := st.ConsoleUser(ctx, token, idle, maxAge)
			if err != nil || got.ID != u.ID || got.CanChange() {
				t.Fatalf("got %+v, %v; want the viewer", got, err)
			}
		}
	})
	t.Run("ErrIdle", func(t *testing.T) {
		clock = clock.Add(idle + time.Second)
		if _, err := st.ConsoleUser(ctx, token, idle, maxAge); !errors.Is(err, store.ErrExpired) {
			t.Fatalf("got %v, want ErrExpired", err)
		}
		if _, err := st.ConsoleUser(ctx, token, idle, maxAge); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("after expiry: got %v, want ErrNotFound (the session is removed)", err)
		}
	})
	t.Run("ErrMaxAge", func(t *testing.T) {
		tok, err := st.NewConsoleSession(ctx, u.ID)
		if err != nil {
			t.Fatal(err)
		}
		for elapsed := time.Duration(0); elapsed < maxAge; elapsed += 25 * time.Minute {
			clock = clock.Add(25 * time.Minute)
			if _, err := st.ConsoleUser(ctx, tok, idle, maxAge); err != nil {
				if elapsed+25*time.Minute > maxAge && errors.Is(err, store.ErrExpired) {
					return
				}
				t.Fatalf("after %s: %v", elapsed+25*time.Minute, err)
			}
		}
		t.Fatal("got a session alive past its maximum age, want ErrExpired")
	})
	t.Run("ErrEnded", func(t *testing.T) {
		tok, err := st.NewConsoleSession(ctx, u.ID)
		if err != nil {
			t.Fatal(err)
		}
		if err := st.EndConsoleSession(ctx, tok); err != nil {
			t.Fatal(err)
		}
		if _, err := st.ConsoleUser(ctx, tok, idle, maxAge); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("got %v, want ErrNotFound", err)
		}
	})
	t.Run("ErrUnknownToken", func(t *testing.T) {
		if _, err := st.ConsoleUser(ctx, "not-a-token", idle, maxAge); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("got %v, want ErrNotFound", err)
		}
	})
}

func TestLoginFailures(t *testing.T) {
	ctx := context.Background()
	st := mustOpen(t, "")
	clock := time.Date(2027, 5, 4, 9, 0, 0, 0, time.UTC)
	st.Now = func() time.Time { return clock }
	for i := range 4 {
		addr := "192.0.2.1"
		if i == 3 {
			addr = "198.51.100.7"
		}
		if err := st.RecordLoginFailure(ctx, "Mira@example.org", addr); err != nil {
			t.Fatal(err)
		}
		clock = clock.Add(time.Minute)
	}
	t.Run("OKCounts", func(t *testing.T) {
		byEmail, byAddr, err := st.LoginFailures(ctx, "mira@example.org", "192.0.2.1", clock.Add(-time.Hour))
		if err != nil {
			t.Fatal(err)
		}
		if byEmail.N != 4 || byAddr.N != 3 || !byEmail.Last.Equal(clock.Add(-time.Minute)) || !byAddr.Last.Equal(clock.Add(-2*time.Minute)) {
			t.Errorf("got %+v and %+v, want 4 by address of the account (last a minute ago) and 3 by client address (last two minutes ago)", byEmail, byAddr)
		}
	})
	t.Run("OKWindow", func(t *testing.T) {
		byEmail, _, err := st.LoginFailures(ctx, "mira@example.org", "192.0.2.1", clock.Add(-150*time.Second))
		if err != nil {
			t.Fatal(err)
		}
		if byEmail.N != 2 {
			t.Errorf("got %d failures in the last 150 s, want 2", byEmail.N)
		}
	})
	t.Run("OKNone", func(t *testing.T) {
		byEmail, byAddr, err := st.LoginFailures(ctx, "other@example.org", "203.0.113.9", clock.Add(-time.Hour))
		if err != nil || byEmail.N != 0 || byAddr.N != 0 || !byEmail.Last.IsZero() {
			t.Errorf("got %+v %+v %v, want none", byEmail, byAddr, err)
		}
	})
}
