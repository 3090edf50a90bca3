/**
 * A result being fetched: the figures the fetching process records in the job's `fetch`
 * field (jobdesk/transfer.py), as words and as a progress bar for the row and the details.
 */
import { formatBytes } from './format';

export interface IFetch {
  stage: 'download' | 'convert';
  bytes: number;
  total?: number | null;
  rows?: number | null;
  percent?: number | null;
}

export function describeFetch(fetch: IFetch): string {
  const pct = fetch.percent === null || fetch.percent === undefined ? '' : ` (${Math.round(fetch.percent)} %)`;
  if (fetch.stage === 'convert') {
    return `converting ${(fetch.rows ?? 0).toLocaleString('en-US')} rows${pct}`;
  }
  const of = fetch.total ? ` of ${formatBytes(fetch.total)}` : '';
  return `downloading ${formatBytes(fetch.bytes)}${of}${pct}`;
}

/** `<progress>` with a label; indeterminate when the length is not known. */
export function fetchProgress(fetch: IFetch | null | undefined): HTMLElement | null {
  if (!fetch) {
    return null;
  }
  const wrap = document.createElement('span');
  wrap.className = 'jd-fetch';
  const bar = document.createElement('progress');
  bar.max = 100;
  if (fetch.percent !== null && fetch.percent !== undefined) {
    bar.value = fetch.percent;
  }
  const words = describeFetch(fetch);
  bar.setAttribute('aria-label', words);
  const label = document.createElement('span');
  label.textContent = words;
  wrap.append(bar, label);
  return wrap;
}
