/**
 * The sidebar's state and its only door to the server: the jobdesk REST API.
 *
 * Components read `model.jobs` and friends and listen to `changed`; they never call the server.
 * Live updates come from a long-poll on `changes?since=<token>`: the server answers as soon as
 * the index changes (or after ~25 s), and the model then reloads the pages it shows.
 */
import { URLExt } from '@jupyterlab/coreutils';
import { ServerConnection } from '@jupyterlab/services';
import { ISignal, Signal } from '@lumino/signaling';

import { ACTIVE, TERMINAL } from './format';

/** One job as the REST API returns it (the index row). */
export interface IJobRecord {
  id: string;
  key: string;
  service: string;
  adql: string;
  canonical?: string | null;
  maxrec?: number | null;
  fmt?: string | null;
  label?: string | null;
  phase: string;
  job_url?: string | null;
  created: number;
  submitted?: number | null;
  started?: number | null;
  finished?: number | null;
  updated?: number | null;
  rows?: number | null;
  truncated?: number | null;
  result_bytes?: number | null;
  parquet_sha256?: string | null;
  error?: string | null;
  notebook?: string | null;
  user?: string | null;
  host?: string | null;
  layer?: string | null;
  warnings?: string[] | null;
  analysis?: string | null; // the first analysis the job joined (see src/analyses.ts)
  unreachable_since?: number | null;
  last_error?: string | null;
  next_try?: number | null;
  service_started?: number | null;
  service_finished?: number | null;
  [other: string]: unknown;
}

export interface IJobPage {
  jobs: IJobRecord[];
  total: number;
  limit: number;
  offset: number;
  token: string;
}

export interface IJobDetails {
  job: IJobRecord;
  history: Array<{ phase: string; at: number; note?: string | null }>;
  provenance: unknown;
  provenance_missing?: string | null;
  /** What went wrong, in jobdesk's words, and what to do next (failed jobs only). */
  problem?: { error: string; message: string; hint: string; detail?: string | null } | null;
  /** "service unreachable for 40 s, retrying (next try in 5 s)" while the service is silent. */
  unreachable?: string | null;
  /** How long the job ran by the service's own clock (startTime to endTime), if it said. */
  service_seconds?: number | null;
}

export interface IPreview {
  columns: Array<{
    name: string;
    unit?: string | null;
    ucd?: string | null;
    description?: string | null;
    datatype?: string | null;
  }>;
  rows: unknown[][];
  total_rows: number;
  bytes?: number | null;
}

export interface ICacheSummary {
  entries: number; // files
  results?: number; // results: a VOTable and its Parquet copy count once
  bytes: number;
  layers: Array<{
    name: string;
    kind: string;
    entries: number | null;
    results?: number | null;
    bytes: number | null;
  }>;
}

export interface IFilter {
  phase: string; // comma-separated phase names, '' for all
  text: string;
  /** created (newest first), finished, rows, size (largest first): sorted by the server. */
  sort?: string;
  /** Only the jobs of this notebook ('' = jobs with no notebook); undefined = all. */
  notebook?: string;
  /** Only the jobs of this analysis, where the index records analyses. */
  analysis?: string;
}

/** Jobs and cache use of one notebook (or analysis), from `groups?by=`. */
export interface IGroup {
  value: string;
  jobs: number;
  cached: number;
  bytes: number;
  rows: number;
}

export interface IGroups {
  by: string;
  available: boolean;
  groups: IGroup[];
}

/** What a quick look can show for one result. */
export interface IQuickLookInfo {
  sky: { ra: string; dec: string } | null;
  numeric: Array<{ name: string; unit?: string | null }>;
}

/** An error answer of the REST API, with the server's message and hint. */
export class DeskRequestError extends Error {
  constructor(
    message: string,
    readonly status: number,
    readonly hint: string = ''
  ) {
    super(message);
  }
}

/**
 * One request to the REST API under `<base>/jobdesk/api/`: JSON in, JSON out, an error answer
 * as DeskRequestError with the server's message (and the closest names it suggests) and hint.
 * Every sidebar model calls the server through this function.
 */
export async function deskRequest<T>(
  settings: ServerConnection.ISettings,
  path: string,
  init: RequestInit = {}
): Promise<T> {
  const url = URLExt.join(settings.baseUrl, 'jobdesk', 'api', path);
  const response = await ServerConnection.makeRequest(url, init, settings);
  const text = await response.text();
  let body: any = null;
  try {
    body = text ? JSON.parse(text) : null;
  } catch {
    body = { message: text };
  }
  if (!response.ok) {
    const more = body?.suggestions?.length ? ` (did you mean ${body.suggestions.join(', ')}?)` : '';
    throw new DeskRequestError(
      (body?.message || response.statusText || `HTTP ${response.status}`) + more,
      response.status,
      body?.hint || ''
    );
  }
  return body as T;
}

export const PAGE_SIZE = 100;

export class JobDeskModel {
  constructor(settings?: ServerConnection.ISettings) {
    this.settings = settings ?? ServerConnection.makeSettings();
  }

  readonly settings: ServerConnection.ISettings;
  jobs: IJobRecord[] = [];
  total = 0;
  filter: IFilter = { phase: '', text: '' };
  cache: ICacheSummary | null = null;
  loading = false;
  error = '';
  /** How long the last list request took, in milliseconds (shown in the footer's tooltip). */
  lastLoadMs = 0;

  get changed(): ISignal<this, void> {
    return this._changed;
  }

  /** The change feed saw the index change (open details reload their job on it). */
  get feedChanged(): ISignal<this, void> {
    return this._feedChanged;
  }

  /** Notebooks (and analyses, when recorded) with their jobs and cache use. */
  groups: { notebook: IGroups | null; analysis: IGroups | null } = {
    notebook: null,
    analysis: null
  };

  /** A watched job reached a terminal phase while the sidebar was open. */
  get finished(): ISignal<this, IJobRecord> {
    return this._finished;
  }

  get isDisposed(): boolean {
    return this._disposed;
  }

  get hasMore(): boolean {
    return this.jobs.length < this.total;
  }

  /** Load the first page and start following the change feed. */
  async start(): Promise<void> {
    await this.refresh();
    await this.watchActive(false);
    void this.follow();
  }

  dispose(): void {
    this._disposed = true;
    this._abort.abort();
  }

  setFilter(filter: Partial<IFilter>): Promise<void> {
    this.filter = { ...this.filter, ...filter };
    return this.refresh();
  }

  /** Reload everything shown: as many rows as are on screen now (at least one page). */
  async refresh(): Promise<void> {
    const wanted = Math.max(PAGE_SIZE, this.jobs.length);
    const serial = ++this._serial;
    this.loading = true;
    this._changed.emit();
    try {
      const t0 = performance.now();
      const page = await this.page(0, Math.min(wanted, 500));
      this.lastLoadMs = performance.now() - t0;
      if (serial !== this._serial) {
        return; // a newer refresh (e.g. another filter) has started
      }
      this.jobs = page.jobs;
      this.total = page.total;
      this.error = '';
      this.cache = await this.request<ICacheSummary>('cache').catch(() => this.cache);
      await this.loadGroups();
    } catch (err) {
      this.error = (err as Error).message;
    } finally {
      if (serial === this._serial) {
        this.loading = false;
        this._changed.emit();
      }
    }
  }

  /** Append the next page ("more"). */
  async loadMore(): Promise<void> {
    if (!this.hasMore || this.loading) {
      return;
    }
    this.loading = true;
    this._changed.emit();
    try {
      const page = await this.page(this.jobs.length, PAGE_SIZE);
      const seen = new Set(this.jobs.map(j => j.id));
      this.jobs = this.jobs.concat(page.jobs.filter(j => !seen.has(j.id)));
      this.total = page.total;
    } catch (err) {
      this.error = (err as Error).message;
    } finally {
      this.loading = false;
      this._changed.emit();
    }
  }

  /** Jobs and cache use per notebook and per analysis, for the grouping menus. */
  async loadGroups(): Promise<void> {
    const query = new URLSearchParams();
    if (this.filter.phase) {
      query.set('phase', this.filter.phase);
    }
    for (const by of ['notebook', 'analysis'] as const) {
      if (this.groups[by] && !this.groups[by]!.available) {
        continue; // this index records no analyses: do not ask on every refresh
      }
      query.set('by', by);
      this.groups[by] = await this.request<IGroups>(`groups?${query}`).catch(
        () => this.groups[by]
      );
    }
  }

  page(offset: number, limit: number): Promise<IJobPage> {
    const query = new URLSearchParams({ limit: String(limit), offset: String(offset) });
    if (this.filter.sort && this.filter.sort !== 'created') {
      query.set('sort', this.filter.sort);
    }
    if (this.filter.notebook !== undefined) {
      query.set('notebook', this.filter.notebook);
    }
    if (this.filter.analysis !== undefined) {
      query.set('analysis', this.filter.analysis);
    }
    if (this.filter.phase) {
      query.set('phase', this.filter.phase);
    }
    if (this.filter.text.trim()) {
      query.set('text', this.filter.text.trim());
    }
    return this.request<IJobPage>(`jobs?${query}`);
  }

  details(id: string): Promise<IJobDetails> {
    return this.request<IJobDetails>(`jobs/${encodeURIComponent(id)}`);
  }

  preview(id: string, rows = 20): Promise<IPreview> {
    return this.request<IPreview>(`jobs/${encodeURIComponent(id)}/preview?rows=${rows}`);
  }

  quickLookInfo(id: string): Promise<IQuickLookInfo> {
    return this.request<IQuickLookInfo>(`jobs/${encodeURIComponent(id)}/quicklook`);
  }

  /** A quick-look image as SVG text (drawn by the server from the cached result). */
  async quickLook(id: string, kind: 'sky' | 'histogram', column = ''): Promise<string> {
    const query = kind === 'histogram' ? `?column=${encodeURIComponent(column)}` : '';
    const url = URLExt.join(
      this.settings.baseUrl, 'jobdesk', 'api', 'jobs', encodeURIComponent(id), 'quicklook', kind
    ) + query;
    const response = await ServerConnection.makeRequest(url, { signal: this._abort.signal }, this.settings);
    const text = await response.text();
    if (!response.ok) {
      let message = text;
      try {
        message = JSON.parse(text).message || text;
      } catch {
        // not JSON: keep the text
      }
      throw new DeskRequestError(message || `HTTP ${response.status}`, response.status);
    }
    return text;
  }

  async snippet(id: string): Promise<string> {
    const answer = await this.request<{ snippet: string }>(
      `jobs/${encodeURIComponent(id)}/snippet`
    );
    return answer.snippet;
  }

  async abort(id: string): Promise<IJobRecord> {
    const answer = await this.request<{ job: IJobRecord }>(
      `jobs/${encodeURIComponent(id)}/abort`,
      { method: 'POST' }
    );
    this.replace(answer.job);
    return answer.job;
  }

  async forget(id: string): Promise<void> {
    await this.request(`jobs/${encodeURIComponent(id)}`, { method: 'DELETE' });
    this.jobs = this.jobs.filter(j => j.id !== id);
    this.total = Math.max(0, this.total - 1);
    this._active.delete(id);
    this._changed.emit();
  }

  /** Python that sends a job's query again (to edit in a notebook before running it). */
  async queryCode(id: string): Promise<string> {
    const answer = await this.request<{ code: string }>(`jobs/${encodeURIComponent(id)}/code`);
    return answer.code;
  }

  /** Send a failed or unreached job's query again: same query, a new job. */
  async resend(id: string): Promise<IJobRecord> {
    const answer = await this.request<{ job: IJobRecord }>(
      `jobs/${encodeURIComponent(id)}/resend`,
      { method: 'POST' }
    );
    await this.refresh();
    return answer.job;
  }

  async pin(id: string, pinned: boolean): Promise<void> {
    await this.request(`jobs/${encodeURIComponent(id)}/pin`, {
      method: 'POST',
      body: JSON.stringify({ pinned })
    });
  }

  async setLabel(id: string, label: string): Promise<IJobRecord> {
    const answer = await this.request<{ job: IJobRecord }>(`jobs/${encodeURIComponent(id)}`, {
      method: 'PATCH',
      body: JSON.stringify({ label })
    });
    this.replace(answer.job);
    return answer.job;
  }

  /** Write the result with its provenance to `path`, relative to the server's root directory. */
  async exportTo(id: string, path: string): Promise<string[]> {
    const answer = await this.request<{ written: string[] }>(
      `jobs/${encodeURIComponent(id)}/export`,
      { method: 'POST', body: JSON.stringify({ path }) }
    );
    return answer.written;
  }

  /** Call the REST API under `<base>/jobdesk/api/`; JSON in, JSON out, errors as exceptions. */
  async request<T>(path: string, init: RequestInit = {}): Promise<T> {
    return deskRequest<T>(this.settings, path, { signal: this._abort.signal, ...init });
  }

  private replace(record: IJobRecord): void {
    this.jobs = this.jobs.map(j => (j.id === record.id ? record : j));
    this._changed.emit();
  }

  /** Follow the change feed until disposed; reload and look for finished jobs on each change. */
  private async follow(): Promise<void> {
    let token = '';
    while (!this._disposed) {
      try {
        const answer = await this.request<{ token: string; changed: boolean }>(
          `changes?since=${encodeURIComponent(token)}`
        );
        if (answer.changed && token !== '') {
          this._feedChanged.emit();
          await this.refresh();
          await this.watchActive(true);
        }
        token = answer.token;
      } catch (err) {
        if (this._disposed) {
          return;
        }
        this.error = `live updates paused: ${(err as Error).message}`;
        this._changed.emit();
        await new Promise(resolve => setTimeout(resolve, 5000));
      }
    }
  }

  /**
   * Keep the set of active jobs (whatever the filter shows) and announce those that left it.
   */
  private async watchActive(announce: boolean): Promise<void> {
    let page: IJobPage;
    try {
      page = await this.page0Active();
    } catch {
      return;
    }
    const now = new Map(page.jobs.map(j => [j.id, j] as [string, IJobRecord]));
    if (announce) {
      for (const id of this._active.keys()) {
        if (now.has(id)) {
          continue;
        }
        // The list may predate the job's end (it left the active set between the two
        // requests): then ask for the job itself.
        const shown = this.jobs.find(j => j.id === id);
        const record = shown && TERMINAL.has(shown.phase)
          ? shown
          : await this.details(id).then(d => d.job, () => null);
        if (record && TERMINAL.has(record.phase)) {
          this._finished.emit(record);
        }
      }
    }
    this._active = now;
  }

  private page0Active(): Promise<IJobPage> {
    const query = new URLSearchParams({ limit: '500', offset: '0', phase: ACTIVE.join(',') });
    return this.request<IJobPage>(`jobs?${query}`);
  }

  private _changed = new Signal<this, void>(this);
  private _finished = new Signal<this, IJobRecord>(this);
  private _feedChanged = new Signal<this, void>(this);
  private _active = new Map<string, IJobRecord>();
  private _abort = new AbortController();
  private _disposed = false;
  private _serial = 0;
}
