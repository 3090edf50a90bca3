/**
 * Analyses and release re-runs in the sidebar: the REST calls, and a small view of a re-run's
 * progress step by step with a link that opens each step's comparison report.
 *
 * The view only draws what `plans/<id>` answers; it asks through the model's `request` (the
 * one door to the server) and polls while steps are still running.
 */
import { URLExt } from '@jupyterlab/coreutils';
import { Widget } from '@lumino/widgets';

import { JobDeskModel } from './model';

export interface IAnalysis {
  name: string;
  steps: number;
  created: number;
  updated: number;
  plans: string[];
}

export interface IPlanStep {
  step: number;
  state: 'waiting' | 'running' | 'done' | 'failed' | 'blocked';
  old_job: string;
  new_job?: string | null;
  old_adql: string;
  new_adql: string;
  error?: string | null;
}

export interface IPlan {
  id: string;
  analysis: string;
  into: string;
  steps: IPlanStep[];
  failed: Array<{ step: number; error: string }>;
  finished: boolean;
}

export async function listAnalyses(model: JobDeskModel): Promise<IAnalysis[]> {
  return (await model.request<{ analyses: IAnalysis[] }>('analyses')).analyses;
}

export async function getPlan(model: JobDeskModel, id: string): Promise<IPlan> {
  return model.request<IPlan>(`plans/${encodeURIComponent(id)}`);
}

export async function startPlan(model: JobDeskModel, id: string): Promise<IPlan> {
  const answer = await model.request<{ plan: IPlan }>(
    `plans/${encodeURIComponent(id)}/start`,
    { method: 'POST' }
  );
  return answer.plan;
}

/** Address of the self-contained HTML report comparing two jobs' results. */
export function reportUrl(model: JobDeskModel, oldId: string, newId: string): string {
  return URLExt.join(
    model.settings.baseUrl,
    'jobdesk',
    'api',
    'compare',
    encodeURIComponent(oldId),
    encodeURIComponent(newId),
    'report'
  );
}

const STATE_WORDS: Record<IPlanStep['state'], string> = {
  waiting: 'waiting for its inputs',
  running: 'running',
  done: 'done',
  failed: 'failed',
  blocked: 'blocked: a step it needs failed'
};

/** One re-run plan, step by step; refreshes every few seconds until every step has ended. */
export class RerunProgress extends Widget {
  constructor(
    private readonly model: JobDeskModel,
    private readonly planId: string,
    private readonly interval = 3000
  ) {
    super();
    this.addClass('jp-jobdesk-rerun');
    void this.refresh();
  }

  async refresh(): Promise<void> {
    if (this.isDisposed) {
      return;
    }
    try {
      const plan = await getPlan(this.model, this.planId);
      this.draw(plan);
      if (!plan.finished) {
        this._timer = window.setTimeout(() => void this.refresh(), this.interval);
      }
    } catch (error) {
      this.node.textContent = `Cannot read re-run ${this.planId}: ${(error as Error).message}`;
    }
  }

  dispose(): void {
    window.clearTimeout(this._timer);
    super.dispose();
  }

  private draw(plan: IPlan): void {
    const node = this.node;
    node.replaceChildren();
    const title = document.createElement('div');
    title.className = 'jp-jobdesk-rerun-title';
    const done = plan.steps.filter(s => s.state === 'done').length;
    title.textContent = `${plan.analysis} → ${plan.into}: ${done} of ${plan.steps.length} steps done`;
    node.appendChild(title);
    const list = document.createElement('ol');
    for (const step of plan.steps) {
      const item = document.createElement('li');
      item.dataset.state = step.state;
      item.textContent = `Step ${step.step}: ${STATE_WORDS[step.state]}`;
      if (step.error) {
        item.title = step.error;
      }
      if (step.state === 'done' && step.new_job) {
        const link = document.createElement('a');
        link.href = reportUrl(this.model, step.old_job, step.new_job);
        link.target = '_blank';
        link.rel = 'noopener';
        link.textContent = 'open comparison report';
        item.append(' · ', link);
      }
      list.appendChild(item);
    }
    node.appendChild(list);
  }

  private _timer = 0;
}

/**
 * Every analysis of this desk with its re-runs, each re-run drawn step by step (RerunProgress),
 * for the main area. It only reads `analyses` and `plans/<id>`; it starts nothing.
 */
export class AnalysesView extends Widget {
  constructor(private readonly model: JobDeskModel) {
    super();
    this.id = 'jobdesk-analyses';
    this.addClass('jp-jobdesk-analyses');
    this.title.label = 'Analyses and re-runs';
    this.title.closable = true;
    void this.load();
  }

  async load(): Promise<void> {
    this.node.replaceChildren();
    let analyses: IAnalysis[];
    try {
      analyses = await listAnalyses(this.model);
    } catch (error) {
      this.node.textContent = `Cannot read the analyses: ${(error as Error).message}`;
      return;
    }
    const heading = document.createElement('h2');
    heading.textContent = 'Analyses and re-runs';
    this.node.appendChild(heading);
    if (!analyses.length) {
      const empty = document.createElement('p');
      empty.textContent =
        'No analyses yet: submit with analysis="name" (or inside `with desk.analysis("name"):`), ' +
        'then desk.rerun("name", rename={...}) makes a re-run that shows here.';
      this.node.appendChild(empty);
      return;
    }
    for (const analysis of analyses) {
      const section = document.createElement('section');
      section.className = 'jp-jobdesk-analysis';
      section.dataset.analysis = analysis.name;
      const name = document.createElement('h3');
      name.textContent = `${analysis.name} · ${analysis.steps} step${analysis.steps === 1 ? '' : 's'}`;
      section.appendChild(name);
      if (!analysis.plans.length) {
        const none = document.createElement('p');
        none.textContent = 'No re-run of this analysis yet.';
        section.appendChild(none);
      }
      for (const planId of analysis.plans) {
        const progress = new RerunProgress(this.model, planId);
        this._children.push(progress);
        section.appendChild(progress.node);
      }
      this.node.appendChild(section);
    }
  }

  dispose(): void {
    for (const child of this._children) {
      child.dispose();
    }
    super.dispose();
  }

  private _children: RerunProgress[] = [];
}
