package store_test

import (
	"context"
	"fmt"
	"os"
	"strings"
	"sync/atomic"
	"testing"

	"github.com/jackc/pgx/v5"

	"sluice/server/store"
)

// postgresURL returns the URL of the test cluster. Without one the test
// skips, unless SLUICE_TEST_POSTGRES=require (set by scripts/test through
// scripts/pg-test-cluster), where it fails.
func postgresURL(t testing.TB) string {
	t.Helper()
	url := os.Getenv("SLUICE_TEST_POSTGRES_URL")
	if url != "" {
		return url
	}
	if os.Getenv("SLUICE_TEST_POSTGRES") == "require" {
		t.Fatal("SLUICE_TEST_POSTGRES=require but SLUICE_TEST_POSTGRES_URL is empty: PostgreSQL was expected and is not there")
	}
	t.Skip("PostgreSQL tests skipped: SLUICE_TEST_POSTGRES_URL is not set. scripts/test runs them on a throwaway cluster " +
		"(not with --quick); by hand: scripts/pg-test-cluster go test ./server/store/")
	return ""
}

var schemaSeq atomic.Int64

// freshSchema creates an empty schema for one test, dropped when it ends,
// and returns url with that schema as its search_path.
func freshSchema(t testing.TB, url string) string {
	t.Helper()
	ctx := context.Background()
	conn, err := pgx.Connect(ctx, url)
	if err != nil {
		t.Fatalf("connecting to the test cluster: %v", err)
	}
	defer func() { _ = conn.Close(ctx) }()
	name := fmt.Sprintf("t%d_%d", os.Getpid(), schemaSeq.Add(1))
	if _, err := conn.Exec(ctx, "CREATE SCHEMA "+name); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		c, err := pgx.Connect(ctx, url)
		if err != nil {
			t.Errorf("dropping schema %s: %v", name, err)
			return
		}
		defer func() { _ = c.Close(ctx) }()
		if _, err := c.Exec(ctx, "DROP SCHEMA "+name+" CASCADE"); err != nil {
			t.Errorf("dropping schema %s: %v", name, err)
		}
	})
	sep := "?"
	if strings.Contains(url, "?") {
		sep = "&"
	}
	return url + sep + "search_path=" + name
}

// openPostgres opens a store on a fresh schema.
func openPostgres(t testing.TB, url string) *store.Postgres {
	t.Helper()
	return openPostgresAt(t, freshSchema(t, url))
}

func openPostgresAt(t testing.TB, url string) *store.Postgres {
	t.Helper()
	s, err := store.OpenPostgres(context.Background(), url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = s.Close() })
	return s
}

func TestPostgresConformance(t *testing.T) {
	url := postgresURL(t)
	testConformance(t, func(t *testing.T) func() store.Store {
		at := freshSchema(t, url)
		return func() store.Store { return openPostgresAt(t, at) }
	})
}

func TestPostgresBadURL(t *testing.T) {
	_, err := store.OpenPostgres(context.Background(), "postgres://user:s3cret@[::1")
	if err == nil || strings.Contains(err.Error(), "s3cret") {
		t.Fatalf("bad URL: %v, want an error that does not repeat the password", err)
	}
}
