// Package export writes breath records and alert events to CSV and Parquet
// files for R, pandas or DuckDB.
//
// Records come as an iterator (iter.Seq2[Record, error]) so that any store
// can feed them: ReadNDJSON reads what `trapline analyze` prints and what
// the daemon publishes; JetStream reads the daemon's streams. Columns follow
// the JSON keys of the records (units in the names, as in pip_cmh2o) and
// are derived from the project's own record types, so that a field added to
// a record becomes a column without a change here. docs/export.md describes
// the files.
package export
