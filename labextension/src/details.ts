/**
 * One job in full, in the main area: the whole query, the phase history, a preview of the
 * cached result (read by the server from the cache, no kernel involved) and the provenance.
 */
import { Signal } from '@lumino/signaling';
import { Widget } from '@lumino/widgets';

import {
  TERMINAL,
  firstLine,
  formatBytes,
  formatDuration,
  formatRows,
  formatWhen,
  hostOf,
  phaseFamily
} from './format';
import { IFetch, describeFetch } from './fetch';
import { IJobDetails, IJobRecord, IPreview, JobDeskModel } from './model';
import { IPanelActions, phaseBadge } from './panel';
import { estimateText } from './estimatetext';
import { quickLookSection } from './quicklook';

export class JobDetails extends Widget {
  constructor(
    private readonly model: JobDeskModel,
    private readonly actions: IPanelActions,
    readonly jobId: string,
    private readonly known: IJobRecord | null = null
  ) {
    super();
    this.addClass('jd-details');
    this.id = `jobdesk-job-${jobId}`;
    this.title.label = `Job ${jobId.slice(0, 8)}`;
    this.title.closable = true;
    this.node.tabIndex = -1;
    // Follow the job as its sidebar row does: the same change feed, reloaded when it moved.
    model.changed.connect(() => {
      const row = model.jobs.find(j => j.id === jobId);
      if (row && row.updated !== this.shownUpdated) {
        void this.load(true);
      }
    }, this);
    model.feedChanged.connect(() => {
      if (!model.jobs.some(j => j.id === jobId)) {
        void this.load(true);
      }
    }, this);
    void this.load();
  }

  dispose(): void {
    Signal.clearData(this);
    super.dispose();
  }

  /** Draw the job; `quiet` (a live update) keeps the page as it is unless the job moved. */
  async load(quiet = false): Promise<void> {
    if (this.loadingNow) {
      this.again = true;
      return;
    }
    this.loadingNow = true;
    try {
      await this.draw(quiet);
    } finally {
      this.loadingNow = false;
    }
    if (this.again) {
      this.again = false;
      void this.load(true);
    }
  }

  private async draw(quiet: boolean): Promise<void> {
    if (!quiet) {
      this.node.replaceChildren(para('jd-muted', 'Loading…'));
    }
    let details: IJobDetails;
    try {
      details = await this.model.details(this.jobId);
    } catch (err) {
      if (quiet) {
        return; // keep what is shown; the next change tries again
      }
      // Show what the list already knows, with the reason the rest is missing.
      const problem = para('jd-error', `Details unavailable: ${(err as Error).message}`);
      this.node.replaceChildren(problem);
      if (this.known) {
        this.node.replaceChildren(
          this.header(this.known),
          problem,
          section('Query', pre(this.known.adql)),
          section('Facts', this.facts(this.known, null))
        );
      }
      return;
    }
    const job = details.job;
    if (quiet && job.updated === this.shownUpdated) {
      return;
    }
    this.shownUpdated = job.updated ?? null;
    const scroll = this.node.scrollTop;
    const opened = this.node.querySelector('details')?.open ?? false;
    this.title.label = job.label || firstLine(job.adql).slice(0, 30) || this.title.label;
    this.node.replaceChildren(
      this.header(job),
      section('Query', pre(job.adql)),
      section('Facts', this.facts(job, details)),
      section('Phase history', this.history(details))
    );
    const trouble = this.trouble(job, details);
    if (trouble) {
      this.node.insertBefore(trouble, this.node.children[1] || null);
    }
    if (job.phase === 'COMPLETED' && job.parquet_sha256) {
      const holder = section('Preview', para('jd-muted', 'Reading the cached result…'));
      this.node.append(holder);
      this.model.preview(this.jobId).then(
        preview => holder.replaceChildren(heading('Preview'), previewTable(preview)),
        err => holder.replaceChildren(heading('Preview'), para('jd-error', err.message))
      );
      // Keep the quick look (and the histogram the user drew) while the result is the same.
      if (!this.quick || this.quickSha !== job.parquet_sha256) {
        this.quick = quickLookSection(this.model, this.jobId);
        this.quickSha = job.parquet_sha256;
      }
      this.node.append(this.quick);
    }
    const prov = details.provenance
      ? pre(JSON.stringify(details.provenance, null, 2))
      : para('jd-muted', details.provenance_missing || 'No provenance yet.');
    const block = document.createElement('details');
    const summary = document.createElement('summary');
    summary.textContent = 'Provenance (JSON)';
    block.open = opened;
    block.append(summary, prov);
    this.node.append(block);
    this.node.scrollTop = scroll;
  }

  private shownUpdated: number | null = null;
  private loadingNow = false;
  private again = false;
  private quick: HTMLElement | null = null;
  private quickSha: string | null = null;

  private header(job: IJobRecord): HTMLElement {
    const head = document.createElement('div');
    head.className = 'jd-details-head';
    const title = document.createElement('h2');
    title.textContent = job.label || firstLine(job.adql);
    const tools = document.createElement('div');
    tools.className = 'jd-row-tools';
    if (job.phase === 'COMPLETED') {
      tools.append(
        action('Insert snippet', () => this.actions.insertSnippet(job)),
        action('Copy snippet', () => this.actions.copySnippet(job))
      );
    }
    if (!TERMINAL.has(job.phase)) {
      tools.append(action('Abort', () => this.actions.abort(job)));
    }
    if (job.phase === 'COMPLETED' && job.parquet_sha256) {
      tools.append(action('Export…', () => this.actions.exportResult(job)));
    }
    tools.append(
      action('Pin', () => this.actions.pin(job)),
      action('Edit label…', () => this.actions.editLabel(job)),
      action('Reload', () => void this.load())
    );
    head.append(phaseBadge(job.phase), title, tools);
    return head;
  }

  /** For a failed job: the service's message, our hint, and the next steps; for a job whose
   * service is silent: since when and when the next try is. */
  private trouble(job: IJobRecord, details: IJobDetails): HTMLElement | null {
    if (!details.problem && !details.unreachable) {
      return null;
    }
    const node = document.createElement('section');
    node.className = 'jd-trouble';
    node.append(heading(details.problem ? 'What happened' : 'Service unreachable'));
    if (details.unreachable) {
      node.append(para('jd-error jd-unreachable', details.unreachable));
      if (job.last_error) {
        node.append(para('jd-muted', job.last_error));
      }
    }
    if (details.problem) {
      node.append(
        para('jd-error jd-service-message', job.error || details.problem.message),
        para('jd-hint', `What to do: ${details.problem.hint}`)
      );
      const steps = document.createElement('div');
      steps.className = 'jd-row-tools jd-next-steps';
      steps.append(
        action('Send again', () => this.actions.resend(job)),
        action('Edit in a notebook', () => this.actions.editInNotebook(job)),
        action('Forget', () => this.actions.forget(job))
      );
      node.append(steps);
      if (details.problem.detail) {
        const more = document.createElement('details');
        const summary = document.createElement('summary');
        summary.textContent = 'Technical detail';
        more.append(summary, pre(details.problem.detail));
        node.append(more);
      }
    }
    return node;
  }

  private facts(job: IJobRecord, details: IJobDetails | null): HTMLElement {
    const ran = details?.service_seconds;
    const rows: Array<[string, string]> = [
      ['Job id', job.id],
      ['Service', `${hostOf(job.service)} (${job.service})`],
      ['Service job', job.job_url || '—'],
      ['Created', formatWhen(job.created)],
      ['Started', formatWhen(job.service_started || job.started)],
      ['Finished', formatWhen(job.service_finished || job.finished)],
      [
        'Ran on the service',
        ran === null || ran === undefined ? '— (the service gave no start and end times)'
          : `${formatDuration(ran)} (the service's startTime to endTime)`
      ],
      ['Rows', formatRows(job.rows) + (job.truncated ? ' — truncated, not the full answer' : '')],
      ['Size', formatBytes(job.result_bytes)],
      ['Estimate', estimateText(job) || '—'],
      ['MAXREC', job.maxrec === null || job.maxrec === undefined ? 'service default' : String(job.maxrec)],
      ['Cache', job.parquet_sha256 ? `${job.layer || 'personal'} cache` : job.fetch ? describeFetch(job.fetch as IFetch) : 'not cached'],
      ['Notebook', job.notebook || '—'],
      ['Submitted by', [job.user, job.host].filter(Boolean).join(' on ') || '—'],
      // An abort's reason is a note; an error is an error.
      [phaseFamily(job.phase) === 'stopped' ? 'Note' : 'Error', job.error || '—'],
      ['Warnings', (job.warnings || []).join('; ') || '—']
    ];
    const table = document.createElement('table');
    table.className = 'jd-facts';
    for (const [name, value] of rows) {
      const tr = table.insertRow();
      const th = document.createElement('th');
      th.textContent = name;
      tr.append(th);
      tr.insertCell().textContent = value;
    }
    return table;
  }

  private history(details: IJobDetails): HTMLElement {
    const list = document.createElement('ol');
    list.className = 'jd-history';
    for (const step of details.history) {
      const item = document.createElement('li');
      item.append(phaseBadge(step.phase), ` ${formatWhen(step.at)}${step.note ? ` — ${step.note}` : ''}`);
      list.append(item);
    }
    return list;
  }
}

function previewTable(preview: IPreview): HTMLElement {
  const wrap = document.createElement('div');
  wrap.className = 'jd-preview';
  wrap.append(
    para(
      'jd-muted',
      `${formatRows(preview.total_rows)} · ${formatBytes(preview.bytes)} · first ${preview.rows.length} shown`
    )
  );
  const table = document.createElement('table');
  const head = table.createTHead().insertRow();
  for (const column of preview.columns) {
    const th = document.createElement('th');
    th.textContent = column.name;
    if (column.unit) {
      const unit = document.createElement('span');
      unit.className = 'jd-unit';
      unit.textContent = ` [${column.unit}]`;
      th.append(unit);
    }
    th.title = [column.description, column.ucd, column.datatype].filter(Boolean).join('\n');
    head.append(th);
  }
  const body = table.createTBody();
  for (const values of preview.rows) {
    const tr = body.insertRow();
    for (const value of values) {
      tr.insertCell().textContent = value === null || value === undefined ? '—' : String(value);
    }
  }
  wrap.append(table);
  return wrap;
}

function section(name: string, content: HTMLElement): HTMLElement {
  const node = document.createElement('section');
  node.append(heading(name), content);
  return node;
}

function heading(name: string): HTMLElement {
  const h = document.createElement('h3');
  h.textContent = name;
  return h;
}

function pre(value: string): HTMLElement {
  const node = document.createElement('pre');
  node.className = 'jd-pre';
  node.textContent = value;
  return node;
}

function para(className: string, value: string): HTMLElement {
  const node = document.createElement('p');
  node.className = className;
  node.textContent = value;
  return node;
}

function action(label: string, onClick: () => void): HTMLButtonElement {
  const node = document.createElement('button');
  node.type = 'button';
  node.className = 'jd-button';
  node.textContent = label;
  node.addEventListener('click', onClick);
  return node;
}
