// Package checkpoint is tidemark's checkpoint file format and the versioned,
// verified store of checkpoints on disk. It knows the engine's state only as
// opaque, already deterministic section bytes.
//
// # File format
//
// All integers are little-endian. This build writes version 2 and reads 1
// and 2. Version 2 puts the table and manifest after the state, so that a
// state is written as it is encoded, key by key (Store.WriteState):
//
//	offset  size   field
//	0       8      magic "TMCKPT\r\n" (the CR LF catches text-mode mangling)
//	8       4      format version, 2
//	12      ...    the sections' bodies, in state order, each one zstd frame
//	                 (RFC 8878) of its stored length
//	T       21·S   section table, one entry per section, in state order:
//	                 u8 kind (0 global, 1 partition), u32 partition,
//	                 u64 raw length, u64 stored length
//	T+21·S  M      manifest: UTF-8 JSON, the Manifest type
//	L−20    4      section count S (at least 1)
//	L−16    4      manifest length M
//	L−12    8      total file length L in bytes
//	L−4     4      CRC-32C (Castagnoli) of bytes 0..L−5
//
// Version 1 has the manifest and table first:
//
//	0       8      magic
//	8       4      format version, 1
//	12      8      total file length in bytes, trailer included
//	20      4      manifest length M
//	24      M      manifest
//	24+M    4      section count S
//	...     53·S   section table: as above, and a 32-byte SHA-256 of each
//	                 section's raw bytes
//	...            the sections' bodies, in table order
//	L−4     4      CRC-32C of bytes 0..L−5
//
// The state digest state_sha256 in the manifest is the SHA-256 of the raw
// section bytes concatenated in table order; it equals the engine's own state
// digest, so two runs over the same events give checkpoints with the same
// state_sha256 whatever their creation times. Each section is compressed on
// its own, so one stream partition's state can be read without decompressing
// the others (Store.LoadSections).
//
// # Verification
//
// A file is loaded only if every check passes, in this order: the magic; the
// format version; the declared length equals the file's (a torn write is
// caught here); the CRC, over the whole file before anything is decompressed;
// the manifest parses; the section table fits the file exactly; the total raw
// length is within StoreConfig.MaxRawBytes (a guard against decompression
// bombs); each body decompresses to exactly its raw length; in version 1 each
// section's SHA-256; and the state digest. Store.Load does all of them;
// Store.Open all but the state digest, which Checkpoint.Verify checks (so
// that hashing a large state can overlap with decoding it). Store.Stream
// reads a format-2 file once, in order, without holding it or its state in
// memory whole (how a service loads its state): it checks the magic, version,
// length, manifest and table when it opens, each body's decompressed length
// as it reads, and the CRC and the state digest when the last byte is read;
// Stream.Close reports them, and a caller keeps what it decoded only if Close
// returns nil. A failing file
// yields an error wrapping ErrCorrupt (and a more precise sentinel where
// there is one) with the file name and byte offset; it is never loaded and
// never modified, and Store.Latest offers the newest version that passes.
//
// # Store
//
// Files are named ckpt-<version, 20 digits>.tdmk so that names sort by
// version. Versions increase by one from the newest file present, except in
// a Kafka consumer group: there a partition's store is written by whichever
// instance owns the partition, and a checkpoint carries the group generation
// of its writer (Manifest.Generation). Generation g writes versions
// g·2³² + 1, + 2, …, so the newest version is always the newest owner's. A
// write of an older generation than the newest version's is refused
// (ErrFenced) before anything is written, and one that a newer owner's write
// overtakes while it is in flight removes its own file and is refused too:
// an instance that lost a partition can never make its state the
// partition's newest, and every file in the store is a whole, consistent
// state of the partition at some position. A write goes
// to a temporary file (".tmp-" in its name), is synced, renamed into place, and
// the directory is synced: a crash leaves either the old set or the new file,
// never a partial one under a checkpoint name. Temporary files left by a crash
// are ignored by every reader.
//
// Ownership. A store opened for writing holds a shared advisory lock on the
// file LOCK in its directory until Close. Only a writer that can first take
// that lock exclusively — no other writer has the store open — removes
// temporary files, so a file in flight is never taken from under its writer;
// the lock ends with its holder's process, so a crashed writer's leftovers
// go to the next writer that opens the store alone. A store opened read-only
// (StoreConfig.ReadOnly) creates, locks and removes nothing: the inspecting
// commands use it beside a running service.
//
// A pin is a file ckpt-<version>.pin (holding why it was pinned). Retention
// keeps the newest StoreConfig.Retain versions and every pinned one. The
// directory is created 0700 and files 0600. List reads manifests only (file
// structure and CRC checked, state not decompressed) and keeps what it read
// per version until the file changes; Load, Latest and Verify check
// everything.
//
// A Store is safe for concurrent use.
package checkpoint
