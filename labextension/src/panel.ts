/**
 * The "Job desk" sidebar: filter bar, job list, footer. Renders the model; asks through
 * callbacks for anything that needs the rest of JupyterLab (details, snippets, dialogs).
 *
 * Plain DOM inside a Lumino widget: one page (100 rows) is rebuilt in a few milliseconds, and
 * only the ticking time cells of active jobs change between rebuilds.
 */
import { Widget } from '@lumino/widgets';

import {
  PHASE_FILTERS,
  TERMINAL,
  baseName,
  firstLine,
  formatBytes,
  formatRows,
  hostOf,
  phaseFamily,
  plural,
  timeWords
} from './format';
import { IFetch, fetchProgress } from './fetch';
import { ICacheSummary, IJobRecord, JobDeskModel } from './model';
import { rowsOrEstimate } from './estimatetext';
import { OrderBar } from './order';

export interface IPanelActions {
  openDetails(job: IJobRecord): void;
  insertSnippet(job: IJobRecord): void;
  copySnippet(job: IJobRecord): void;
  abort(job: IJobRecord): void;
  forget(job: IJobRecord): void;
  resend(job: IJobRecord): void;
  editInNotebook(job: IJobRecord): void;
  pin(job: IJobRecord): void;
  exportResult(job: IJobRecord): void;
  editLabel(job: IJobRecord): void;
  openAnalyses(): void;
}

export class JobDeskPanel extends Widget {
  constructor(
    readonly model: JobDeskModel,
    private readonly actions: IPanelActions
  ) {
    super();
    this.id = 'jobdesk-sidebar';
    this.addClass('jd-panel');
    this.title.caption = 'Job desk: remote query jobs';
    this.node.append(this.buildBar(), new OrderBar(model).node, this.summary, this.list, this.footer);
    this.list.className = 'jd-list';
    this.list.setAttribute('role', 'list');
    this.list.setAttribute('aria-label', 'Jobs');
    this.list.addEventListener('keydown', event => this.onListKey(event));
    this.summary.className = 'jd-summary';
    this.summary.setAttribute('aria-live', 'polite');
    this.footer.className = 'jd-footer';
    model.changed.connect(() => this.render(), this);
    this.ticker = window.setInterval(() => this.tick(), 1000);
    this.render();
  }

  dispose(): void {
    window.clearInterval(this.ticker);
    super.dispose();
  }

  /** Rebuild the list from the model, keeping keyboard focus on the same job. */
  render(): void {
    const model = this.model;
    const focusedId = (document.activeElement as HTMLElement | null)?.closest?.('.jd-row')
      ?.getAttribute('data-job-id');
    const rows = model.jobs.map(job => this.row(job));
    this.list.replaceChildren(...rows);
    if (!model.jobs.length && !model.loading) {
      const empty = document.createElement('div');
      empty.className = 'jd-empty';
      empty.textContent = model.filter.phase || model.filter.text || model.filter.notebook !== undefined
        ? 'No job matches this filter.'
        : 'No jobs yet. Submit a query with jobdesk.Desk().submit(...) in a notebook.';
      this.list.append(empty);
    }
    const shown = model.jobs.length;
    this.summary.textContent = model.error
      ? model.error
      : `${model.total.toLocaleString('en-US')} job${model.total === 1 ? '' : 's'}` +
        (shown < model.total ? ` · showing ${shown.toLocaleString('en-US')}` : '') +
        (model.loading ? ' · loading…' : '');
    this.summary.classList.toggle('jd-summary-error', !!model.error);
    this.renderFooter();
    if (focusedId) {
      this.list.querySelector<HTMLElement>(`.jd-row[data-job-id="${focusedId}"]`)?.focus();
    }
  }

  private buildBar(): HTMLElement {
    const bar = document.createElement('div');
    bar.className = 'jd-bar';
    this.phaseSelect.className = 'jd-phase-filter';
    this.phaseSelect.setAttribute('aria-label', 'Show jobs in phase');
    for (const [label, value] of PHASE_FILTERS) {
      const option = document.createElement('option');
      option.value = value;
      option.textContent = label;
      this.phaseSelect.append(option);
    }
    this.phaseSelect.addEventListener('change', () => {
      void this.model.setFilter({ phase: this.phaseSelect.value });
    });
    this.search.type = 'search';
    this.search.className = 'jd-search';
    this.search.placeholder = 'Search';
    this.search.title = 'Search labels, query text or a job id';
    this.search.setAttribute('aria-label', 'Search jobs');
    this.search.addEventListener('input', () => {
      window.clearTimeout(this.searchDelay);
      this.searchDelay = window.setTimeout(() => {
        void this.model.setFilter({ text: this.search.value });
      }, 250);
    });
    const reload = button('⟳', 'Reload the list', () => void this.model.refresh());
    reload.classList.add('jd-reload');
    const reruns = button('Re-runs', 'Analyses and their release re-runs, step by step', () =>
      this.actions.openAnalyses()
    );
    reruns.classList.add('jd-reruns');
    bar.append(this.phaseSelect, this.search, reload, reruns);
    return bar;
  }

  private renderFooter(): void {
    const model = this.model;
    const parts: HTMLElement[] = [];
    if (model.hasMore) {
      const more = button(
        `Show ${Math.min(100, model.total - model.jobs.length)} more`,
        'Load the next page of jobs',
        () => void model.loadMore()
      );
      more.classList.add('jd-more');
      parts.push(more);
    }
    if (model.cache) {
      const cache = document.createElement('div');
      cache.className = 'jd-cache';
      cache.textContent = cacheWords(model.cache);
      cache.title = `A result counts once (its VOTable and Parquet copy together). ` +
        `List loaded in ${model.lastLoadMs.toFixed(0)} ms.`;
      parts.push(cache);
    }
    this.footer.replaceChildren(...parts);
  }

  private row(job: IJobRecord): HTMLElement {
    const row = document.createElement('div');
    row.className = 'jd-row';
    row.tabIndex = 0;
    row.setAttribute('role', 'listitem');
    row.dataset.jobId = job.id;
    row.dataset.phase = job.phase;
    const title = job.label || firstLine(job.adql) || job.id;
    row.setAttribute('aria-label', `${title}, ${job.phase}`);
    row.title = `${firstLine(job.adql)}\nEnter: details`;
    row.addEventListener('dblclick', () => this.actions.openDetails(job));

    const head = document.createElement('div');
    head.className = 'jd-row-head';
    head.append(phaseBadge(job.phase), text('jd-title', title));
    if (job.truncated) {
      const mark = text('jd-truncated', 'truncated');
      mark.title = `Truncated: the service stopped at ${job.rows ?? '?'} rows (MAXREC ${
        job.maxrec ?? 'default'
      } or a service limit). Not the full answer.`;
      head.append(mark);
    }

    const facts = document.createElement('div');
    facts.className = 'jd-row-facts';
    const time = text('jd-time', '');
    time.dataset.jobId = job.id;
    this.timeText(job, time);
    facts.append(
      text('jd-host', hostOf(job.service)),
      time,
      text('jd-rows', rowsOrEstimate(job, formatRows(job.rows))),
      text('jd-bytes', formatBytes(job.result_bytes))
    );
    const fetching = fetchProgress(job.fetch as IFetch | null);
    if (fetching) {
      facts.append(fetching);
    }
    if (job.parquet_sha256) {
      const layer = text('jd-layer', job.layer || 'personal');
      layer.title = `Result cached in the ${job.layer || 'personal'} cache`;
      facts.append(layer);
    }
    if (job.notebook) {
      const nb = text('jd-notebook', baseName(job.notebook));
      nb.title = `Submitted from ${job.notebook}`;
      facts.append(nb);
    }

    const tools = document.createElement('div');
    tools.className = 'jd-row-tools';
    tools.append(button('Details', 'Query, provenance and preview', () =>
      this.actions.openDetails(job)
    ));
    if (job.phase === 'COMPLETED') {
      tools.append(
        button('Insert snippet', 'Insert code that loads this result below the active cell', () =>
          this.actions.insertSnippet(job)
        ),
        button('Copy snippet', 'Copy code that loads this result', () =>
          this.actions.copySnippet(job)
        )
      );
    }
    if (!TERMINAL.has(job.phase)) {
      const abort = button('Abort', 'Abort this job on its service', () =>
        this.actions.abort(job)
      );
      abort.classList.add('jd-danger');
      tools.append(abort);
    }
    const forget = button('Forget', 'Remove this record from the index', () =>
      this.actions.forget(job)
    );
    forget.classList.add('jd-quiet');
    tools.append(forget);

    row.append(head, facts, tools);
    if (job.error && job.phase !== 'COMPLETED') {
      // An abort (asked for, often by the user) is a note, not an error in red.
      row.append(text(phaseFamily(job.phase) === 'stopped' ? 'jd-note' : 'jd-error', job.error));
    }
    return row;
  }

  /** How long the job has waited or run, in words true to its phase (see `timeWords`). */
  private timeText(job: IJobRecord, node: HTMLElement): void {
    node.textContent = timeWords(job, Date.now() / 1000);
    node.dataset.active = TERMINAL.has(job.phase) ? '' : '1';
  }

  private tick(): void {
    if (!this.isVisible) {
      return;
    }
    const byId = new Map(this.model.jobs.map(j => [j.id, j] as [string, IJobRecord]));
    for (const node of this.list.querySelectorAll<HTMLElement>('.jd-time[data-active="1"]')) {
      const job = byId.get(node.dataset.jobId || '');
      if (job) {
        this.timeText(job, node);
      }
    }
  }

  private onListKey(event: KeyboardEvent): void {
    const row = (event.target as HTMLElement).closest<HTMLElement>('.jd-row');
    if (!row || event.target !== row) {
      return;
    }
    const job = this.model.jobs.find(j => j.id === row.dataset.jobId);
    if (!job) {
      return;
    }
    if (event.key === 'Enter') {
      event.preventDefault();
      this.actions.openDetails(job);
    } else if (event.key === 'ArrowDown' || event.key === 'ArrowUp') {
      event.preventDefault();
      const next = (event.key === 'ArrowDown'
        ? row.nextElementSibling
        : row.previousElementSibling) as HTMLElement | null;
      next?.focus();
    } else if (event.key === 'Delete') {
      event.preventDefault();
      this.actions.forget(job);
    }
  }

  private phaseSelect = document.createElement('select');
  private search = document.createElement('input');
  private summary = document.createElement('div');
  private list = document.createElement('div');
  private footer = document.createElement('div');
  private searchDelay = 0;
  private ticker: number;
}

export function phaseBadge(phase: string): HTMLElement {
  const badge = text(
    `jd-phase jd-phase-${phaseFamily(phase)} jd-phase-${phase.toLowerCase()}`,
    phase.toLowerCase()
  );
  badge.title = `UWS phase ${phase}`;
  return badge;
}

/** "Cached here: 12 results, 4.1 MB · group lab: 3 results, 2.0 MB". */
export function cacheWords(cache: ICacheSummary): string {
  const layers = cache.layers.length
    ? cache.layers
    : [{ name: 'personal', kind: 'personal', entries: cache.entries, bytes: cache.bytes }];
  const parts = layers.map(layer => {
    const count = layer.results ?? layer.entries;
    const held = count === null || count === undefined
      ? 'not readable now'
      : count === 0
        ? 'no results yet'
        : `${plural(count, 'result')}, ${formatBytes(layer.bytes)}`;
    return layer.kind === 'personal' ? `Cached here: ${held}` : `group ${layer.name}: ${held}`;
  });
  return parts.join(' · ');
}

function text(className: string, value: string): HTMLElement {
  const span = document.createElement('span');
  span.className = className;
  span.textContent = value;
  return span;
}

function button(label: string, title: string, onClick: () => void): HTMLButtonElement {
  const node = document.createElement('button');
  node.type = 'button';
  node.className = 'jd-button';
  node.textContent = label;
  node.title = title;
  node.addEventListener('click', event => {
    event.stopPropagation();
    onClick();
  });
  return node;
}
