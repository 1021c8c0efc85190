// check.mjs reads the Parquet tables of "reckon export" back with DuckDB
// and prints, as one JSON object on standard output, the row counts, the
// column types and a few values and aggregates, for the Go test in
// clients/export (TestDuckDBReadsTheExport) to compare with the journal.
//
// usage: node check.mjs EXPORT_DIR
//
// @duckdb/node-api is loaded from the node_modules directory named by the
// environment variable RECKON_DUCKDB, or else from the one beside this
// file (npm ci here).
import { createRequire } from 'node:module';
import { join, dirname } from 'node:path';
import { fileURLToPath, pathToFileURL } from 'node:url';

const here = dirname(fileURLToPath(import.meta.url));
const modules = process.env.RECKON_DUCKDB || join(here, 'node_modules');
const require = createRequire(join(dirname(modules), 'check.mjs'));
const { DuckDBInstance, version } = await import(pathToFileURL(require.resolve('@duckdb/node-api')).href);

const dir = process.argv[2];
if (!dir) {
	console.error('usage: node check.mjs EXPORT_DIR');
	process.exit(2);
}

const instance = await DuckDBInstance.create(':memory:');
const db = await instance.connect();
for (const table of ['runs', 'inputs', 'poses', 'events']) {
	const file = join(dir, table + '.parquet').replaceAll("'", "''");
	await db.run(`CREATE VIEW ${table} AS SELECT * FROM read_parquet('${file}')`);
}

// rows runs a query and returns its rows as objects; BIGINT values come as
// strings (exact), DOUBLE as numbers.
async function rows(sql) {
	const reader = await db.runAndReadAll(sql);
	return reader.getRowObjectsJson();
}

const out = { duckdb: version() };
out.counts = (await rows(`SELECT
	(SELECT count(*) FROM runs) AS runs, (SELECT count(*) FROM inputs) AS inputs,
	(SELECT count(*) FROM poses) AS poses, (SELECT count(*) FROM events) AS events`))[0];

out.types = {};
for (const table of ['runs', 'inputs', 'poses', 'events']) {
	out.types[table] = Object.fromEntries((await rows(`DESCRIBE ${table}`)).map((r) => [r.column_name, r.column_type]));
}

out.runs = await rows(`SELECT robot, run, deleted, inputs, fixes, applied, held, gated, events, distrusted_ns
	FROM runs ORDER BY robot, deleted DESC, run`);

// Per run, from the inputs table: counts by final verdict and the held
// inputs decided later.
out.inputs = await rows(`SELECT robot, run, count(*) AS inputs,
	count(*) FILTER (WHERE kind = 'fix') AS fixes,
	count(*) FILTER (WHERE final_verdict = 'applied') AS applied,
	count(*) FILTER (WHERE final_verdict = 'gated') AS gated,
	count(*) FILTER (WHERE verdict = 'held' AND final_verdict <> 'held') AS held_decided,
	min(sequence) AS first_sequence, max(sequence) AS last_sequence,
	count(nis) AS with_nis
	FROM inputs GROUP BY robot, run ORDER BY robot, run`);

// The time the pose was not trusted, per run, from the poses alone (the
// README's query).
out.distrusted = await rows(`SELECT robot, run, sum(next_ns - stamp_ns) AS distrusted_ns
	FROM (SELECT robot, run, stamp_ns, trusted,
		lead(stamp_ns) OVER (PARTITION BY robot, run ORDER BY sequence) AS next_ns FROM poses)
	WHERE NOT trusted AND next_ns > stamp_ns
	GROUP BY robot, run ORDER BY robot, run`);

// The last pose of each run.
out.last = await rows(`SELECT robot, run, sequence, stamp_ns, x_m, y_m, heading_rad, cov_xx_m2, cov_xy_m2, cov_hh_rad2,
	position95_m, trusted, distrust
	FROM poses QUALIFY row_number() OVER (PARTITION BY robot, run ORDER BY sequence DESC) = 1
	ORDER BY robot, run`);

// Per sensor, the fraction of its fixes gated (the README's query).
out.sensors = await rows(`SELECT robot, sensor_id, count(*) AS fixes,
	avg(CASE WHEN final_verdict = 'gated' THEN 1 ELSE 0 END) AS gated_fraction
	FROM inputs WHERE kind = 'fix' GROUP BY robot, sensor_id ORDER BY robot, sensor_id`);

out.events = await rows(`SELECT robot, run, kind, count(*) AS n FROM events
	GROUP BY robot, run, kind ORDER BY robot, run, kind`);

// Joins on the shared key: every input has its pose.
out.unjoined = (await rows(`SELECT count(*) AS n FROM inputs i
	ANTI JOIN poses p USING (robot, run, sequence)`))[0].n;

console.log(JSON.stringify(out));
