/* What RocksDB itself costs per key, without Python: the lower bound of the tool's RocksDB steps.
 *
 *     apt-get install librocksdb-dev        # Debian's RocksDB (7.8.3 on bookworm), headers + library
 *     gcc -O2 benchmarks/rocksdb_floor.c -lrocksdb -o /tmp/rocksdb_floor
 *     /tmp/rocksdb_floor /tmp/floor-dir [keys]
 *     python -m benchmarks.rocksdb_floor /tmp/floor-dir-py [keys]    # the same through rocksdict
 *
 * Not part of the tool (which uses rocksdict and its bundled RocksDB, the engine's version): a
 * measuring stick only. It writes `keys` sorted keys of 24 bytes with 40-byte pseudo-random values
 * into one SST file with the engine's table options (format 5, full bloom filter of 10 bits, XXH3
 * checksums, LZ4; see migrate/providers/rocksdb_db.py:db_options), ingests the file into a new
 * database, reopens it read-only with one table-opening thread and scans it without filling the
 * block cache, and prints the CPU microseconds per key of the puts and of the scan.
 */
#include <rocksdb/c.h>

#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

static double
cpu_seconds(void)
{
    struct timespec t;
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &t);
    return (double)t.tv_sec + (double)t.tv_nsec * 1e-9;
}

static void
check(char *err, const char *what)
{
    if (err != NULL) {
        fprintf(stderr, "rocksdb_floor: %s: %s\n", what, err);
        exit(1);
    }
}

int
main(int argc, char **argv)
{
    if (argc < 2) {
        fprintf(stderr, "usage: %s DIR [keys]\n", argv[0]);
        return 2;
    }
    long n = argc > 2 ? atol(argv[2]) : 200000;
    char path[4096], sst[4200], db_path[4200];
    snprintf(path, sizeof path, "%s", argv[1]);
    snprintf(sst, sizeof sst, "%s/run.sst", path);
    snprintf(db_path, sizeof db_path, "%s/db", path);

    /* keys "key-%016ld" + 4 zero bytes (24 bytes, ascending); values from a 64-bit LCG (Knuth's MMIX
     * constants, common practice), so they do not compress much */
    char *keys = calloc((size_t)n, 24), *values = malloc((size_t)n * 40);
    uint64_t x = 20261202;
    for (long i = 0; i < n; i++) {
        snprintf(keys + 24 * i, 24, "key-%016ld", i);
        for (int j = 0; j < 40; j += 8) {
            x = x * 6364136223846793005ULL + 1442695040888963407ULL;
            memcpy(values + 40 * i + j, &x, 8);
        }
    }

    char *err = NULL;
    rocksdb_options_t *options = rocksdb_options_create();
    rocksdb_block_based_table_options_t *table = rocksdb_block_based_options_create();
    rocksdb_block_based_options_set_format_version(table, 5);
    rocksdb_block_based_options_set_filter_policy(table, rocksdb_filterpolicy_create_bloom_full(10));
    rocksdb_block_based_options_set_checksum(table, 4); /* kXXH3 (rocksdb/table.h ChecksumType) */
    rocksdb_options_set_block_based_table_factory(options, table);
    rocksdb_options_set_compression(options, rocksdb_lz4_compression);
    rocksdb_options_set_create_if_missing(options, 1);

    rocksdb_envoptions_t *env = rocksdb_envoptions_create();
    rocksdb_sstfilewriter_t *writer = rocksdb_sstfilewriter_create(env, options);
    rocksdb_sstfilewriter_open(writer, sst, &err);
    check(err, "open the SST writer");
    double t = cpu_seconds();
    for (long i = 0; i < n; i++) {
        rocksdb_sstfilewriter_put(writer, keys + 24 * i, 24, values + 40 * i, 40, &err);
        check(err, "put");
    }
    rocksdb_sstfilewriter_finish(writer, &err);
    check(err, "finish the SST file");
    double put_us = (cpu_seconds() - t) / (double)n * 1e6;

    rocksdb_t *db = rocksdb_open(options, db_path, &err);
    check(err, "create the database");
    rocksdb_ingestexternalfileoptions_t *ingest = rocksdb_ingestexternalfileoptions_create();
    rocksdb_ingestexternalfileoptions_set_move_files(ingest, 1);
    const char *files[] = {sst};
    rocksdb_ingest_external_file(db, files, 1, ingest, &err);
    check(err, "ingest");
    rocksdb_close(db);

    rocksdb_options_t *read_options = rocksdb_options_create();
    rocksdb_options_set_max_file_opening_threads(read_options, 1);
    db = rocksdb_open_for_read_only(read_options, db_path, 0, &err);
    check(err, "open read-only");
    rocksdb_readoptions_t *scan = rocksdb_readoptions_create();
    rocksdb_readoptions_set_fill_cache(scan, 0);
    rocksdb_readoptions_set_verify_checksums(scan, 1);
    t = cpu_seconds();
    rocksdb_iterator_t *it = rocksdb_create_iterator(db, scan);
    long seen = 0;
    size_t bytes = 0;
    for (rocksdb_iter_seek_to_first(it); rocksdb_iter_valid(it); rocksdb_iter_next(it)) {
        size_t klen, vlen;
        rocksdb_iter_key(it, &klen);
        rocksdb_iter_value(it, &vlen);
        bytes += klen + vlen;
        seen++;
    }
    rocksdb_iter_get_error(it, &err);
    check(err, "scan");
    double scan_us = (cpu_seconds() - t) / (double)(seen ? seen : 1) * 1e6;
    if (seen != n || bytes != (size_t)n * 64) {
        fprintf(stderr, "rocksdb_floor: read back %ld keys / %zu bytes, wrote %ld keys\n", seen, bytes, n);
        return 1;
    }
    printf("RocksDB C API: %ld keys, put %.3f CPU us per key, scan %.3f CPU us per key\n", n, put_us, scan_us);
    rocksdb_iter_destroy(it);
    rocksdb_close(db);
    return 0;
}
