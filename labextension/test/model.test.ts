/**
 * The sidebar's model against a real Jupyter server running the jobdesk extension.
 *
 * Started by tests/server/test_ts_model.py, which seeds a desk with real jobs on the embedded
 * TAP service and passes what the Python library sees of them in JOBDESK_TEST_EXPECT: every
 * expected value here comes from that side, none is written into this file.
 */
import { ServerConnection } from '@jupyterlab/services';
import { afterEach, describe, expect, it } from 'vitest';

import { ACTIVE, TERMINAL } from '../src/format';
import { DeskRequestError, IJobRecord, JobDeskModel } from '../src/model';

interface IExpect {
  total: number;
  completed: string[];
  running: string;
  forget: string;
  text: string;
  text_ids: string[];
  cache_entries: number;
  unknown_id: string;
}

const BASE = process.env.JOBDESK_TEST_BASE_URL ?? '';
const TOKEN = process.env.JOBDESK_TEST_TOKEN ?? '';
const EXPECT: IExpect = JSON.parse(process.env.JOBDESK_TEST_EXPECT ?? '{}');
const live = BASE !== '' && TOKEN !== '';

function model(): JobDeskModel {
  return new JobDeskModel(ServerConnection.makeSettings({ baseUrl: BASE, token: TOKEN }));
}

const models: JobDeskModel[] = [];
function tracked(): JobDeskModel {
  const m = model();
  models.push(m);
  return m;
}

afterEach(() => {
  while (models.length) {
    models.pop()!.dispose();
  }
});

describe.skipIf(!live)('JobDeskModel on a real server', () => {
  it('loads the first page and the cache summary', async () => {
    const m = tracked();
    await m.refresh();
    expect(m.error).toBe('');
    expect(m.total).toBe(EXPECT.total);
    expect(m.jobs.length).toBe(EXPECT.total);
    expect(m.hasMore).toBe(false);
    // Newest first, as the library lists them.
    const created = m.jobs.map(j => j.created);
    expect([...created].sort((a, b) => b - a)).toEqual(created);
    expect(m.cache?.entries).toBe(EXPECT.cache_entries);
  });

  it('filters by phase and by text on the server', async () => {
    const m = tracked();
    await m.setFilter({ phase: 'COMPLETED' });
    expect(m.jobs.map(j => j.id).sort()).toEqual([...EXPECT.completed].sort());
    expect(m.jobs.every(j => j.phase === 'COMPLETED')).toBe(true);
    await m.setFilter({ phase: '', text: EXPECT.text });
    expect(m.jobs.map(j => j.id).sort()).toEqual([...EXPECT.text_ids].sort());
  });

  it('pages with loadMore without repeating a job', async () => {
    const m = tracked();
    const first = await m.page(0, 2);
    const rest = await m.page(2, 100);
    const ids = [...first.jobs, ...rest.jobs].map(j => j.id);
    expect(new Set(ids).size).toBe(EXPECT.total);
    expect(first.total).toBe(EXPECT.total);
  });

  it('reads details, preview and snippet of a finished job', async () => {
    const m = tracked();
    const id = EXPECT.completed[0];
    const details = await m.details(id);
    expect(details.job.id).toBe(id);
    expect(details.history.map(h => h.phase)).toContain('COMPLETED');
    const preview = await m.preview(id, 3);
    expect(preview.rows.length).toBe(Math.min(3, details.job.rows ?? 0));
    expect(preview.total_rows).toBe(details.job.rows);
    const snippet = await m.snippet(id);
    expect(snippet).toContain(id);
  });

  it('turns an error answer into DeskRequestError with the server message', async () => {
    const m = tracked();
    const failure = await m.details(EXPECT.unknown_id).catch(e => e);
    expect(failure).toBeInstanceOf(DeskRequestError);
    expect((failure as DeskRequestError).status).toBe(404);
    expect((failure as DeskRequestError).message.length).toBeGreaterThan(0);
  });

  it('forgets a job on the server and in its list', async () => {
    const m = tracked();
    await m.refresh();
    const before = m.total;
    await m.forget(EXPECT.forget);
    expect(m.jobs.some(j => j.id === EXPECT.forget)).toBe(false);
    expect(m.total).toBe(before - 1);
    const again = model();
    await again.refresh();
    expect(again.jobs.some(j => j.id === EXPECT.forget)).toBe(false);
    again.dispose();
  });

  it('announces a followed job that ends (abort through the server)', async () => {
    const m = tracked();
    await m.start();
    const running = m.jobs.find(j => j.id === EXPECT.running);
    expect(running && ACTIVE.includes(running.phase)).toBe(true);
    const announced = new Promise<IJobRecord>(resolve => {
      m.finished.connect((_, record) => {
        if (record.id === EXPECT.running) {
          resolve(record);
        }
      });
    });
    const aborted = await m.abort(EXPECT.running);
    expect(aborted.phase).toBe('ABORTED');
    const record = await announced;
    expect(TERMINAL.has(record.phase)).toBe(true);
  }, 60_000);
});
