package checkpoint

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"hash/crc32"
)

// encodeFile builds a checkpoint file of format version 1, which this build
// reads but no longer writes: the tests keep it to make such files. compress
// appends the zstd frame of src to dst.
func encodeFile(m *Manifest, secs []Section, compress func(src, dst []byte) []byte) ([]byte, error) {
	if len(secs) == 0 {
		return nil, fmt.Errorf("checkpoint: no sections to write")
	}
	m.StateSHA256 = stateDigest(secs)
	m.RawBytes = 0
	for _, s := range secs {
		m.RawBytes += int64(len(s.Bytes))
	}
	man, err := json.Marshal(m)
	if err != nil {
		return nil, fmt.Errorf("checkpoint: manifest: %w", err)
	}
	bodies := make([][]byte, len(secs))
	for i, s := range secs {
		bodies[i] = compress(s.Bytes, nil)
	}
	b := make([]byte, 0, headerLen+len(man)+4+entryLen*len(secs))
	b = append(b, magic...)
	b = binary.LittleEndian.AppendUint32(b, 1)
	b = binary.LittleEndian.AppendUint64(b, 0) // length, patched below
	b = binary.LittleEndian.AppendUint32(b, uint32(len(man)))
	b = append(b, man...)
	b = binary.LittleEndian.AppendUint32(b, uint32(len(secs)))
	for i, s := range secs {
		kind := byte(kindPartiton)
		if s.Global {
			kind = kindGlobal
		}
		b = append(b, kind)
		b = binary.LittleEndian.AppendUint32(b, uint32(s.Partition))
		b = binary.LittleEndian.AppendUint64(b, uint64(len(s.Bytes)))
		b = binary.LittleEndian.AppendUint64(b, uint64(len(bodies[i])))
		sum := sha256.Sum256(s.Bytes)
		b = append(b, sum[:]...)
	}
	for _, body := range bodies {
		b = append(b, body...)
	}
	binary.LittleEndian.PutUint64(b[12:20], uint64(len(b)+trailerLen))
	b = binary.LittleEndian.AppendUint32(b, crc32.Checksum(b, castagnoli))
	return b, nil
}
